"""Benchmark: ``qcd scan`` of a 16-channel gap-free file (ABF2 and NWB) against a 16-channel floor.

    .venv/bin/python tests/benchmarks/bench_channels.py             # 1 GB files
    .venv/bin/python tests/benchmarks/bench_channels.py --gb 0.25   # smaller, for a busy machine

Files are written in /tmp and deleted afterwards:

- ABF2: the header of ../shared/data/abf/gapfree_16_channels.abf (or QCD_ABF_DATA) with its
  data section (the last section of that file) grown to the wanted size, int16 samples;
- NWB: an ElectricalSeries of the same int16 samples (time x 16, contiguous) written with
  pynwb from a memmap of the ABF's data section.

Each variant runs in its own child, qcd and its floor alternating (fastest of 3 counts; wall and
CPU time, peak resident memory of the child):

- floor ABF: one numpy.memmap window per chunk of all 16 channels, then one rfft per 1 s block
  of every channel (float64, as numpy's rfft of int16 data takes it);
- floor NWB: one h5py read of all 16 channels per chunk, then the same rffts.

Both floors run with one BLAS thread, as qcd runs (bench_scan.floor_env: the variables
qcd/__init__.py sets), so the ratio compares like with like.

Targets: qcd within 1.3x of the floor (1.5x for NWB), peak memory under 250 MB.
"""
from __future__ import annotations

import argparse
import os
import struct
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_scan import blas_note, floor_env  # noqa: E402

DATA = Path(os.environ.get("QCD_ABF_DATA", HERE.parents[2] / "shared" / "data" / "abf"))
TEMPLATE = DATA / "gapfree_16_channels.abf"
N_CH = 16
REPEATS = 3
_DATA_ENTRY = 236          # ABF2 header: the data section's (block, bytes, count) entry


def _noise_chunks(n_rows: int, seed: int = 0, rows: int = 1 << 18):
    """int16 (rows, 16) chunks: white noise of a few hundred counts plus a 50 Hz line."""
    rng = np.random.default_rng(seed)
    done = 0
    while done < n_rows:
        m = min(rows, n_rows - done)
        x = rng.standard_normal((m, N_CH), dtype=np.float32) * 300.0
        x += (200.0 * np.sin(2 * np.pi * 50.0 * (done + np.arange(m)) / 10_000.0)
              ).astype(np.float32)[:, None]
        yield np.rint(x).astype("<i2")
        done += m


def write_abf2(path: Path, n_rows: int) -> tuple[int, float]:
    """The 16-channel template's header with n_rows sample rows; (data offset, fs)."""
    head = TEMPLATE.read_bytes()
    block, entry, count = struct.unpack_from("<IIq", head, _DATA_ENTRY)
    start = block * 512
    assert entry == 2 and start + entry * count == len(head), "data must be the last section"
    out = bytearray(head[:start])
    struct.pack_into("<IIq", out, _DATA_ENTRY, block, entry, n_rows * N_CH)
    with open(path, "wb") as f:
        f.write(out)
        for x in _noise_chunks(n_rows):
            f.write(x.tobytes())
    sys.path.insert(0, str(HERE.parents[1]))
    from qcd.recording import open_recording
    with open_recording(path) as rec:
        assert rec.gap_free and len(rec.channels) == N_CH and rec.n_samples == n_rows
        return start, rec.fs


def write_nwb(path: Path, source: Path, offset: int, n_rows: int, fs: float) -> None:
    """The ABF's int16 samples (a read-only memmap of its data section) as an NWB file."""
    from datetime import datetime, timezone

    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.ecephys import ElectricalSeries
    data = np.memmap(source, dtype="<i2", mode="r", offset=offset, shape=(n_rows, N_CH))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nwb = NWBFile(session_description="bench", identifier="bench-16",
                      session_start_time=datetime(2024, 1, 1, tzinfo=timezone.utc))
        dev = nwb.create_device(name="probe")
        grp = nwb.create_electrode_group(name="shank", description="", location="bench",
                                         device=dev)
        for _ in range(N_CH):
            nwb.add_electrode(group=grp, location="bench")
        region = nwb.create_electrode_table_region(list(range(N_CH)), "all")
        nwb.add_acquisition(ElectricalSeries(name="field", data=data, electrodes=region,
                                             rate=float(fs), conversion=1e-6))
        with NWBHDF5IO(str(path), "w") as io:
            io.write(nwb)
    del data


_FLOOR_ABF = r"""
import sys, numpy as np
path, offset, n, fs = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
L = int(fs); C = 16
rows = max(L, (1 << 20) // C // L * L)
acc = np.zeros(L // 2 + 1)
for s in range(0, n - L + 1, rows):
    e = min(n, s + rows) // L * L
    mm = np.memmap(path, dtype="<i2", mode="r", offset=offset + 2 * C * s, shape=(e - s, C))
    x = np.array(mm)
    del mm
    for c in range(C):
        X = np.fft.rfft(x[:, c].astype(np.float64).reshape(-1, L), axis=1)
        acc += (X.real ** 2 + X.imag ** 2).sum(axis=0)
print(float(acc[1:].sum()))
"""

_FLOOR_NWB = r"""
import sys, numpy as np, h5py
path, n, fs = sys.argv[1], int(sys.argv[2]), float(sys.argv[3])
L = int(fs); C = 16
rows = max(L, (1 << 20) // C // L * L)
acc = np.zeros(L // 2 + 1)
with h5py.File(path, "r") as f:
    d = f["acquisition/field/data"]
    for s in range(0, n - L + 1, rows):
        e = min(n, s + rows) // L * L
        x = d[s:e]
        for c in range(C):
            X = np.fft.rfft(x[:, c].astype(np.float64).reshape(-1, L), axis=1)
            acc += (X.real ** 2 + X.imag ** 2).sum(axis=0)
print(float(acc[1:].sum()))
"""


def run(cmd: list[str], env: dict[str, str] | None = None) -> tuple[float, float, float]:
    """(wall s, CPU s, peak MB) of one child."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    err = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) not in (0, 1):
        raise RuntimeError(f"{cmd[:4]} failed: {err.decode()[-2000:]}")
    return wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024.0


def bench(label: str, cmds: tuple[list[str], list[str]], path: Path) -> None:
    with open(path, "rb") as f:                          # warm the page cache
        while f.read(1 << 24):
            pass
    best: dict[str, tuple[float, float, float]] = {}
    for _ in range(REPEATS):
        for name, cmd, env in zip(("qcd scan", "floor"), cmds, (None, floor_env())):
            w, c, mb = run(cmd, env)
            w0, c0, m0 = best.get(name, (w, c, mb))
            best[name] = (min(w0, w), min(c0, c), max(m0, mb))
    (qw, qc, qm), (fw, fc, fm) = best["qcd scan"], best["floor"]
    print(f"\n{label}")
    print(f"  qcd scan  wall {qw:7.2f} s  CPU {qc:7.2f} s  {qm:7.1f} MB peak")
    print(f"  floor     wall {fw:7.2f} s  CPU {fc:7.2f} s  {fm:7.1f} MB peak")
    print(f"  qcd / floor: wall {qw / fw:.2f}x, CPU {qc / fc:.2f}x; qcd peak {qm:.0f} MB",
          flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--gb", type=float, default=1.0, help="file size in GB (default 1)")
    ap.add_argument("--no-nwb", action="store_true", help="the ABF file only")
    ap.add_argument("--write", nargs=2, metavar=("DIR", "ROWS"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if not TEMPLATE.exists():
        print(f"{TEMPLATE} not found (set QCD_ABF_DATA)", file=sys.stderr)
        return 2
    py = sys.executable
    if args.write:              # in a child: the parent stays small, since a child's peak
        tmp, n = args.write     # memory (ru_maxrss) starts from its parent's size at fork
        offset, fs = write_abf2(Path(tmp) / "bench16.abf", int(n))
        if not args.no_nwb:
            write_nwb(Path(tmp) / "bench16.nwb", Path(tmp) / "bench16.abf", offset, int(n), fs)
        print(offset, fs)
        return 0
    n_rows = int(args.gb * 1e9 / (2 * N_CH)) // 10_000 * 10_000
    with tempfile.TemporaryDirectory(prefix="qcd-bench-", dir="/tmp") as tmp:
        path = Path(tmp) / "bench16.abf"
        t0 = time.perf_counter()
        out = subprocess.run([py, __file__, "--write", tmp, str(n_rows)]
                             + (["--no-nwb"] if args.no_nwb else []),
                             check=True, capture_output=True, text=True).stdout.split()
        offset, fs = int(out[0]), float(out[1])
        print(f"wrote {path} ({path.stat().st_size / 1e9:.2f} GB, {fs:g} Hz) and the NWB in "
              f"{time.perf_counter() - t0:.1f} s; {blas_note()}", flush=True)
        abf = (f"16-channel ABF2: {path.stat().st_size / 1e9:.2f} GB", (
            [py, "-m", "qcd", "scan", "--json", str(path)],
            [py, "-c", _FLOOR_ABF, str(path), str(offset), str(n_rows), str(fs)]))
        nwb = Path(tmp) / "bench16.nwb"
        bench(*abf, path)
        path.unlink()
        if not args.no_nwb:
            bench(f"16-channel NWB: {nwb.stat().st_size / 1e9:.2f} GB", (
                [py, "-m", "qcd", "scan", "--json", str(nwb)],
                [py, "-c", _FLOOR_NWB, str(nwb), str(n_rows), str(fs)]), nwb)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
