"""Formats beyond ABF: the reader registry, NWB through h5py, single-file formats through neo.

References: pyabf-read ABF files against python-neo's own ABF reader (two independent readers
of the real recordings in ../shared/data/abf); NWB files written here with pynwb (the
standard's reference writer) and read back with pynwb's get_data_in_units(); NIX files written
with neo's own writer; the analytic signals of tests/references.py (METHODS.md §1.1-§1.4 cells
behind a Bessel filter, §3.1 Johnson noise, §4.2 hum) with the tolerances of the ABF tests.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
import subprocess
import sys
import warnings
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest

from conftest import ABF_FILES, abf, require_data
from qcd.analyze import analyze, analyze_path
from qcd.config import PATTERNS, TestPulse
from qcd.intake import header_fits
from qcd.neoread import open_neo
from qcd.recording import SUFFIXES, not_finished, open_recording
from references import (K_BOLTZMANN, T_ROOM, sampled_cell, sampled_current_clamp, sine,
                        white_noise)

HERE = Path(__file__).resolve().parent
EPS32 = float(np.finfo(np.float32).eps)
NAMES = [p.name for p in ABF_FILES] or ["(no recordings)"]
ZONE = timezone(timedelta(hours=2))
START = datetime(2024, 5, 1, 9, 30, tzinfo=ZONE)


# ------------------------------------------------------------------------- writers (pynwb)

def _quiet():
    ctx = warnings.catch_warnings()
    ctx.__enter__()
    warnings.simplefilter("ignore")      # the reference writers' own deprecation chatter
    return ctx


def _nwbfile():
    from pynwb import NWBFile
    return NWBFile(session_description="format test", identifier="qcd-formats",
                   session_start_time=START)


def _write(nwb, path: Path) -> Path:
    from pynwb import NWBHDF5IO
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def write_icephys(path: Path, responses, fs: float, *, clamp: str = "VC", stimuli=None,
                  table: bool = True, counts: float | None = None, offset: float = 0.0,
                  t_step: float = 2.0) -> Path:
    """One electrode, one series per sweep (SI values); with ``counts`` the responses are
    stored as int16 counts of that size (conversion) around ``offset``."""
    from pynwb.icephys import (CurrentClampSeries, CurrentClampStimulusSeries,
                               VoltageClampSeries, VoltageClampStimulusSeries)
    ctx = _quiet()
    try:
        nwb = _nwbfile()
        dev = nwb.create_device(name="amplifier")
        el = nwb.create_icephys_electrode(name="pipette1", description="patch", device=dev)
        resp_cls, stim_cls = ((VoltageClampSeries, VoltageClampStimulusSeries) if clamp == "VC"
                              else (CurrentClampSeries, CurrentClampStimulusSeries))
        for k, y in enumerate(responses):
            kw = dict(rate=fs, starting_time=k * t_step, electrode=el, gain=0.02, sweep_number=k)
            if counts:
                data = np.round((np.asarray(y) - offset) / counts).astype(np.int16)
                resp = resp_cls(name=f"response{k:03d}", data=data, conversion=counts,
                                offset=offset, resolution=counts, **kw)
            else:
                resp = resp_cls(name=f"response{k:03d}", data=np.asarray(y), **kw)
            stim = None
            if stimuli is not None:
                stim = stim_cls(name=f"stimulus{k:03d}", data=np.asarray(stimuli[k]), **kw)
            if table:
                nwb.add_intracellular_recording(electrode=el, response=resp, stimulus=stim)
            else:
                nwb.add_acquisition(resp)
                if stim is not None:
                    nwb.add_stimulus(stim)
        return _write(nwb, path)
    finally:
        ctx.__exit__(None, None, None)


def write_extracellular(path: Path, data: np.ndarray, fs: float, *, conversion: float = 1.0,
                        channel_conversion=None, chunks=None) -> Path:
    """An ElectricalSeries (time x channels) over an electrodes table of one group."""
    from pynwb.ecephys import ElectricalSeries
    ctx = _quiet()
    try:
        nwb = _nwbfile()
        dev = nwb.create_device(name="probe")
        grp = nwb.create_electrode_group(name="shank0", description="", location="slice",
                                         device=dev)
        for _ in range(data.shape[1]):
            nwb.add_electrode(group=grp, location="slice")
        region = nwb.create_electrode_table_region(list(range(data.shape[1])), "all")
        stored = data
        if chunks is not None:
            from hdmf.backends.hdf5.h5_utils import H5DataIO
            stored = H5DataIO(data, compression="gzip", compression_opts=1, chunks=chunks)
        nwb.add_acquisition(ElectricalSeries(
            name="field", data=stored, electrodes=region, rate=fs, starting_time=0.0,
            conversion=conversion, channel_conversion=channel_conversion))
        return _write(nwb, path)
    finally:
        ctx.__exit__(None, None, None)


def _pynwb_values(path: Path, name: str) -> np.ndarray:
    """pynwb's own scaled values of an acquisition series (conversion, offset, channel_conversion)."""
    from pynwb import NWBHDF5IO
    ctx = _quiet()
    try:
        with NWBHDF5IO(str(path), "r") as io:
            return np.asarray(io.read().acquisition[name].get_data_in_units())
    finally:
        ctx.__exit__(None, None, None)


def _write_abf1(path: Path, sweeps: np.ndarray, fs: float, unit: str = "pA",
                gap_free: bool = False) -> Path:
    import struct

    import pyabf.abfWriter
    pyabf.abfWriter.writeABF1(np.ascontiguousarray(sweeps, dtype=float), str(path), fs, unit)
    if gap_free:
        with open(path, "r+b") as f:
            f.seek(8)
            f.write(struct.pack("<h", 3))      # nOperationMode 3: gap-free
    return path


# ------------------------------------------------------------------------------- registry

def test_default_patterns_cover_every_supported_suffix():
    assert PATTERNS == tuple(f"*{s}" for s in SUFFIXES)
    assert {".abf", ".nwb", ".nix"} <= set(SUFFIXES)


def test_signature_routes_a_renamed_file(tmp_path):
    src = abf("vc_model_cell_step.abf")
    fake = tmp_path / "renamed.nwb"
    shutil.copyfile(src, fake)
    with open_recording(fake) as rec, open_recording(src) as ref:
        assert rec.format == "ABF2" and any("signature" in n for n in rec.notes)
        assert np.array_equal(rec.sweep(0, 3), ref.sweep(0, 3))
    nwb = write_icephys(tmp_path / "cell.nwb", [np.zeros(100)], 10e3)
    (tmp_path / "cell.abf").write_bytes(nwb.read_bytes())
    with open_recording(tmp_path / "cell.abf") as rec:
        assert rec.format == "NWB"


@pytest.mark.parametrize("module,suffix", [("h5py", ".nwb"), ("neo", ".nix")])
def test_missing_extra_is_a_clear_error_naming_it(tmp_path, module, suffix):
    path = tmp_path / f"x{suffix}"
    write_icephys(path, [np.zeros(100)], 10e3)
    code = (f"import sys; sys.modules[{module!r}] = None\n"   # the package is not installed
            f"from qcd.recording import open_recording\n"
            f"from qcd.errors import RecordingError\n"
            f"try:\n    open_recording({str(path)!r})\n"
            f"except RecordingError as e:\n    print(e.kind, '|', e)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=60, check=True)
    kind, msg = out.stdout.split("|", 1)
    assert kind.strip() == "unsupported"
    assert "pip install 'qcd-ephys[formats]'" in msg and str(path) in msg


# ------------------------------------------------------------- two readers of the real ABFs

def _same_samples(a, b) -> None:
    assert len(a.channels) == len(b.channels)
    for c in range(len(a.channels)):
        x = np.concatenate(list(a.chunks(c)))
        y = np.concatenate(list(b.chunks(c)))
        assert len(x) == len(y)
        scale = float(np.nanmax(np.abs(x))) if len(x) else 0.0
        # both scale the same int16 (or float32) samples; float32 rounding of the scale
        assert np.allclose(x, y, rtol=0, atol=4 * EPS32 * max(scale, 1e-30), equal_nan=True), c


@pytest.mark.parametrize("name", NAMES)
def test_neo_abf_reader_gives_the_same_samples(name):
    require_data()
    with open_recording(abf(name)) as a, open_neo(abf(name)) as b:
        _same_samples(a, b)
        assert b.fs == pytest.approx(a.fs, rel=1e-12)


# Where the two readers state a different structure, measures cannot be compared: neo's ABF
# reader takes these old ABF1 files as one segment, while the native reader follows the
# header's sweep count.
_NEO_STRUCTURE = {
    "abf13_junk_header.abf": "one segment for 3 sweeps (ABF1 before version 1.6)",
    "abf1_invalid_date.abf": "one segment for 50 sweeps (ABF1 before version 1.6)",
}


def _numbers(fm) -> dict:
    out = {}
    for ch in fm.channels:
        for k, m in ch.measures.items():
            if isinstance(m.value, (int, float)) and not isinstance(m.value, bool):
                out[(ch.index, k)] = float(m.value)
    return out


@pytest.mark.parametrize("name", NAMES)
def test_neo_abf_reader_gives_measures_within_0p1_percent(name):
    require_data()
    with open_recording(abf(name)) as a, open_neo(abf(name)) as b:
        if name in _NEO_STRUCTURE:
            assert b.n_sweeps == 1 < a.n_sweeps, _NEO_STRUCTURE[name]
            return
        assert a.sweep_lengths == b.sweep_lengths
        assert b.gap_free == (b.n_sweeps == 1)
        starts_a = np.array(a.sweep_starts_s) - a.sweep_starts_s[0]
        assert np.allclose(starts_a, b.sweep_starts_s, atol=2.0 / a.fs)
        # neo's generic reader carries no protocol, no filter setting and no gap-free flag
        # (one segment is gap-free to qcd): the native reader's protocol and filter are set
        # aside and its gap-free flag given to neo's, so both give analyze the same facts
        b.gap_free = a.gap_free
        a.commands = {}
        a.channels = tuple(dataclasses.replace(c, filter_hz=None, filter_source=None)
                           for c in a.channels)
        ma, mb = _numbers(analyze(a)), _numbers(analyze(b))
    assert ma.keys() == mb.keys()
    for key in ma:
        assert mb[key] == pytest.approx(ma[key], rel=1e-3, abs=1e-12), key


# ------------------------------------------------------------- one chunk of every channel

def _all_recordings(tmp_path) -> list[Path]:
    paths = list(ABF_FILES)
    rng = np.random.default_rng(5)
    paths.append(write_icephys(tmp_path / "ic.nwb", [rng.normal(0, 1e-11, 3000)] * 3, 20e3,
                               counts=1e-13, stimuli=[np.full(3000, -0.07)] * 3))
    paths.append(write_extracellular(tmp_path / "ec.nwb", rng.integers(-900, 900, (5000, 4))
                                     .astype(np.int16), 20e3, conversion=1e-7,
                                     channel_conversion=[1.0, 2.0, 0.5, 1.5]))
    return paths


def test_raw_chunks_all_equals_every_channel_read_alone(tmp_path):
    require_data()
    for path in _all_recordings(tmp_path):
        with open_recording(path) as rec:
            for sweep, size in ((None, 7777), (rec.n_sweeps - 1, 1000)):
                alls = list(rec.raw_chunks_all(sweep, size))
                assert all(0 < len(x) <= size and x.shape[1] == len(rec.channels)
                           for x in alls), path
                joined = np.concatenate(alls)
                scaled = np.concatenate(list(rec.chunks_all(sweep, size)))
                for c in range(len(rec.channels)):
                    alone = np.concatenate(list(rec.raw_chunks(c, sweep, size)))
                    assert np.array_equal(joined[:, c], alone, equal_nan=True), (path, c)
                    assert np.array_equal(scaled[:, c], np.concatenate(
                        list(rec.chunks(c, sweep, size))), equal_nan=True), (path, c)


class _CountingSource:
    """The recording's own source, with every read it serves written down."""

    def __init__(self, src) -> None:
        self.src, self.reads = src, []

    def read(self, a: int, b: int, channel):
        self.reads.append((a, b, channel))
        return self.src.read(a, b, channel)

    def close(self) -> None:
        self.src.close()


@pytest.mark.parametrize("chunk", [1 << 14, 1 << 20])
def test_multichannel_gap_free_file_is_read_once_for_all_channels(chunk):
    # one pass: every sample row of the 16-channel file read once, all channels per read (the
    # unit probe reads at most 4096 samples of one channel); the measures are those of each
    # channel read alone (the same chunks through raw_chunks, which the test above pins)
    require_data()
    with open_recording(abf("gapfree_16_channels.abf")) as rec:
        counting = _CountingSource(rec._src)
        rec._src = counting
        fm = analyze(rec, chunk_size=chunk)
        whole = sorted((a, b) for a, b, c in counting.reads if c is None)
        assert whole[0][0] == 0 and whole[-1][1] == rec.n_samples
        assert all(p[1] == q[0] for p, q in zip(whole, whole[1:]))      # no row twice
        assert all(b - a <= 4096 for a, b, c in counting.reads if c is not None)
    alone = {}
    for c in range(16):
        with open_recording(abf("gapfree_16_channels.abf")) as rec:
            rec.channels = rec.channels[c:c + 1]          # channel c as a file of its own
            rec._src = _OneColumn(rec._src, c)
            alone.update({(c, k): v for (_, k), v in _numbers(analyze(rec)).items()})
    assert _numbers(fm).keys() == alone.keys()
    for key, v in _numbers(fm).items():
        assert v == pytest.approx(alone[key], rel=1e-12, abs=1e-300), key


class _OneColumn:
    """Column ``c`` of a source, as a one-channel source."""

    def __init__(self, src, c: int) -> None:
        self.src, self.c = src, c

    def read(self, a: int, b: int, channel):
        x = self.src.read(a, b, self.c)
        return x if channel is not None else x[:, None]

    def close(self) -> None:
        self.src.close()


def test_int16_abf_and_float64_nwb_of_the_same_samples_agree(tmp_path):
    # the same values through both readers and both sample types: the ABF holds 16-bit
    # converter counts (measured from the counts, scaled at the end), the NWB the float64
    # values those counts stand for (pyabf's scaling, the reference). Every measure agrees to
    # float32 rounding; the voltage channels of the real 16-channel file, in volts
    require_data()
    import pyabf
    src = pyabf.ABF(str(abf("gapfree_16_channels.abf")))
    volts = [c for c, u in enumerate(src.adcUnits) if u in ("mV", "V")]
    data = np.stack([src.data[c] * (1e-3 if src.adcUnits[c] == "mV" else 1.0) for c in volts],
                    axis=1).astype(np.float64)
    nwb = write_extracellular(tmp_path / "same.nwb", data, float(src.dataRate))
    fa, fn = analyze_path(abf("gapfree_16_channels.abf")), analyze_path(nwb)
    assert fa.status == fn.status == "ok" and fn.gap_free
    pairs = [(next(ch for ch in fa.channels if ch.index == c), fn.channels[i])
             for i, c in enumerate(volts)]
    for ca, cn in pairs:
        # float samples have no converter rails: no clipping_fraction from the NWB
        assert ca.measures.keys() - {"clipping_fraction"} == cn.measures.keys(), ca.index
        for k, m in ca.measures.items():
            if k == "clipping_fraction":
                continue
            got = cn.measures[k]
            if isinstance(m.value, bool) or not isinstance(m.value, (int, float)):
                assert got.value == m.value, (ca.index, k)
                continue
            a = units_si(m)
            assert units_si(got) == pytest.approx(a, rel=1e-5, abs=1e-5 * abs(a) + 1e-15), \
                (ca.index, k)


def units_si(m) -> float:
    from qcd import units
    return units.to_si(m.value, m.unit) if m.unit in units.FACTORS else float(m.value)


# ------------------------------------------------------------------------------------ NWB

def test_nwb_samples_and_facts_equal_pynwb(tmp_path):
    # int16 counts with conversion and offset; pynwb's get_data_in_units() is the reference
    rng = np.random.default_rng(3)
    ys = [rng.normal(-50e-12, 5e-12, 2000) for _ in range(3)]
    path = write_icephys(tmp_path / "vc.nwb", ys, 25e3, counts=2e-14, offset=-40e-12,
                         stimuli=[np.full(2000, -0.065)] * 3)
    with open_recording(path) as rec:
        assert rec.format == "NWB" and rec.fs == 25e3 and rec.sweep_lengths == (2000,) * 3
        assert rec.sweep_starts_s == (0.0, 2.0, 4.0) and not rec.gap_free
        assert rec.recorded_at == START and rec.recorded_at.utcoffset() == timedelta(hours=2)
        ch = rec.channels[0]
        assert ch.unit == "pA" and ch.amp_gain == 0.02
        assert ch.resolution == pytest.approx(2e-14 * 1e12)
        for k in range(3):
            want = _pynwb_values(path, f"response{k:03d}") * 1e12
            assert np.allclose(rec.sweep(0, k), want, rtol=1e-12, atol=0)
        cmd = rec.commands[0]
        assert cmd.unit == "mV" and np.allclose(cmd.waveform(1), -65.0)


def test_nwb_whole_cell_behind_bessel_matches_the_abf_version(tmp_path):
    # METHODS §1.1 cell (Ra 10 MOhm, Rm 500 MOhm, Cm 33 pF, dV -5 mV) behind a 4-pole 5 kHz
    # Bessel at 20 kHz: the NWB file carries the step as its stimulus series, the ABF version
    # gets it declared; tolerances as test_analyze's declared-pulse test
    fs, n_pre, n_step, n_post = 20_000.0, 400, 2000, 1600
    rng = np.random.default_rng(1)
    sweeps = np.array([sampled_cell(-5e-3, 10e6, 500e6, 33e-12, fs, n_pre=n_pre,
                                    n_step=n_step, n_post=n_post, filter_hz=5000.0,
                                    noise_sd=0.2e-12, rng=rng) for _ in range(6)])
    stim = np.full(n_pre + n_step + n_post, -0.070)
    stim[n_pre:n_pre + n_step] -= 0.005
    nwb = write_icephys(tmp_path / "cell.nwb", sweeps, fs, stimuli=[stim] * 6)
    fa = analyze_path(_write_abf1(tmp_path / "cell.abf", sweeps * 1e12, fs),
                      pulse=TestPulse(-5.0, n_pre / fs, n_step / fs))
    fn = analyze_path(nwb)
    assert fn.status == "ok" and fn.mode == "voltage_clamp" and fn.format == "NWB"
    ch = fn.channels[0]
    assert any("protocol" in n for n in ch.notes)           # the stimulus is the command
    for fm in (fa, fn):
        ms = fm.channels[0].measures
        assert ms["access_resistance"].value == pytest.approx(10.0, rel=0.1)
        assert ms["membrane_resistance"].value == pytest.approx(500.0, rel=0.05)
        assert ms["membrane_capacitance"].value == pytest.approx(33.0, rel=0.1)
    ma, mn = fa.channels[0].measures, ch.measures
    for key in ("access_resistance", "membrane_resistance", "membrane_capacitance", "tau"):
        assert mn[key].value == pytest.approx(ma[key].value, rel=0.01), key
    # pyabf's writer stores +-1000 pA as int16 cut toward zero (0.03 pA steps), which lowers
    # 0.2 pA of noise by ~7 %: noise is checked against the analytic value, from 6 windows of
    # 400 samples (an SD estimate varies by 1/sqrt(2N) = 3.5 % each)
    assert mn["noise_rms"].value == pytest.approx(0.2, rel=0.1)
    assert mn["holding"].value == pytest.approx(0.0, abs=0.05)


def test_nwb_gap_free_hum_and_noise_match_the_abf_version(tmp_path):
    # white noise 2 pA + 1.5 pA at 50.02 Hz + one event burst, 40 s at 10 kHz (the signal of
    # test_analyze's gap-free test): noise sqrt(2^2 + 1.5^2/2), hum 1.5/sqrt(2) (analytic)
    fs = 10_000.0
    rng = np.random.default_rng(2)
    n = int(40 * fs)
    x = rng.normal(0, 2.0, n) + sine(n, fs, 1.5, 50.02)
    x[int(12.2 * fs):int(12.6 * fs)] += 60.0 * np.sin(np.linspace(0, 40, int(0.4 * fs)))
    nwb = write_icephys(tmp_path / "gapfree.nwb", [x * 1e-12], fs)
    fa = analyze_path(_write_abf1(tmp_path / "gapfree.abf", x[None, :], fs, gap_free=True))
    fn = analyze_path(nwb)
    assert fn.gap_free and fn.status == "ok"
    for fm in (fa, fn):
        ms = fm.channels[0].measures
        assert ms["event_blocks"].value == 1
        assert ms["noise_rms"].value == pytest.approx(math.sqrt(4 + 1.125), rel=0.03)
        assert ms["line_hz"].value == pytest.approx(50.02, abs=0.05)
        assert ms["hum_rms"].value == pytest.approx(1.5 / math.sqrt(2), rel=0.05)
        assert ms["alias_risk"].value is True
        assert ms["pp_over_rms"].value == pytest.approx(7.7, rel=0.15)


def test_nwb_extracellular_johnson_noise_per_electrode(tmp_path):
    # METHODS §8 thermal floor sqrt(4kTRB) [D]: 1 MOhm gives 12.76 uV over 10 kHz (fs 20 kHz);
    # stored as int16 counts with a different channel_conversion per electrode, hum on one
    fs, n = 20_000.0, 20 * 20_000
    rng = np.random.default_rng(4)
    s_v = 4 * K_BOLTZMANN * T_ROOM * 1e6                          # 4kTR, V^2/Hz
    volts = np.stack([white_noise(rng, n, fs, s_v) for _ in range(3)], axis=1)
    volts[:, 2] += sine(n, fs, 20e-6, 50.0)
    cc = np.array([1.0, 0.5, 2.0])
    conv = 2e-8                                                   # V per count
    counts = np.round(volts / (conv * cc)).astype(np.int16)
    path = write_extracellular(tmp_path / "field.nwb", counts, fs, conversion=conv,
                               channel_conversion=cc)
    with open_recording(path) as rec:
        assert rec.gap_free and [c.name for c in rec.channels][0].startswith("electrode 0")
        ref = _pynwb_values(path, "field") * 1e3                 # mV
        got = np.concatenate(list(rec.chunks_all(size=65536)))
        assert np.allclose(got, ref, rtol=1e-12, atol=0)
    fm = analyze_path(path)
    assert fm.mode == "extracellular"
    for c in range(3):
        ms = fm.channels[c].measures
        floor = 12.76e-3                                          # mV
        want = math.sqrt(floor ** 2 + (0.5 * (20e-3) ** 2 if c == 2 else 0.0))
        assert ms["noise_rms"].value == pytest.approx(want, rel=0.03), c
    assert fm.channels[2].measures["hum_rms"].value == pytest.approx(20e-3 / math.sqrt(2),
                                                                     rel=0.05)


def test_nwb_current_clamp_step_gives_input_resistance(tmp_path):
    # METHODS §1.4 [D]: -50 pA into Rin 200 MOhm (tau_m 20 ms) gives -10 mV; sweeps numbered,
    # no recordings table; the stimulus series is the command
    fs, n_pre, n_step, n_post = 20_000.0, 2000, 4000, 4000
    rng = np.random.default_rng(6)
    ys = [sampled_current_clamp(-50e-12, 200e6, 20e-3, fs, n_pre=n_pre, n_step=n_step,
                                n_post=n_post, filter_hz=5e3, noise_sd=0.05e-3, rng=rng)
          for _ in range(4)]
    stim = np.zeros(n_pre + n_step + n_post)
    stim[n_pre:n_pre + n_step] = -50e-12
    path = write_icephys(tmp_path / "cc.nwb", ys, fs, clamp="CC", stimuli=[stim] * 4,
                         table=False)
    with open_recording(path) as rec:
        assert any("sweep numbers" in n for n in rec.notes) and rec.n_sweeps == 4
    fm = analyze_path(path)
    assert fm.mode == "current_clamp"
    assert fm.channels[0].measures["input_resistance"].value == pytest.approx(200.0, rel=0.03)


_BOUNDED = r'''
import sys
import numpy as np
from qcd.recording import open_recording

def status(key):
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) * 1024 for line in fh if line.startswith(key))

with open_recording(sys.argv[1]) as rec:
    next(rec.raw_chunks_all(size=1000))          # h5py, the file opened once, warmed up
    base = status("VmRSS:")
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")                            # resets the peak (VmHWM) to the current RSS
    total = sum(float(np.abs(x).sum()) for x in rec.raw_chunks_all(size=1 << 16))
    one = sum(len(x) for x in rec.chunks(5, size=1 << 16))
    print(status("VmHWM:") - base, total, one)
'''


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="needs Linux /proc")
def test_nwb_with_chunks_and_compression_reads_in_bounded_memory(tmp_path):
    # 16 channels x 1M int16 samples (32 MB) in gzip chunks of 64k x 16: reading all of it
    # must not grow the process by more than a few chunks (common practice: O(chunk))
    n, ch = 1_000_000, 16
    data = (np.random.default_rng(7).normal(0, 300, (n, ch))).astype(np.int16)
    path = write_extracellular(tmp_path / "big.nwb", data, 20e3, conversion=1e-6,
                               chunks=(1 << 16, ch))
    assert path.stat().st_size < data.nbytes          # compressed on disk
    out = subprocess.run([sys.executable, "-c", _BOUNDED, str(path)], capture_output=True,
                         text=True, timeout=120, check=True)
    grew, total, one = out.stdout.split()
    assert float(total) == pytest.approx(float(np.abs(data).sum(dtype=np.float64)))
    assert int(one) == n
    assert int(grew) < 16 << 20, f"grew by {int(grew) >> 20} MB reading {data.nbytes >> 20} MB"


def test_hdf5_is_finished_only_when_its_end_address_matches_its_size(tmp_path):
    import h5py
    path = write_icephys(tmp_path / "done.nwb", [np.zeros(5000)], 10e3)
    size = path.stat().st_size
    assert not_finished(path, size) is None and header_fits(path, size) is None
    blob = path.read_bytes()
    (tmp_path / "cut.nwb").write_bytes(blob[:size // 2])
    assert "still being written" in header_fits(tmp_path / "cut.nwb", size // 2)
    (tmp_path / "longer.nwb").write_bytes(blob + bytes(4096))
    assert "still being written" in not_finished(tmp_path / "longer.nwb", size + 4096)
    # a file a writer still holds open: the superblock is not final until it closes
    live = tmp_path / "live.nwb"
    f = h5py.File(live, "w", locking=False)
    try:
        f["x"] = np.zeros(200_000)
        f.flush()
        f["y"] = np.ones(200_000)
        grown = live.stat().st_size
        assert header_fits(live, grown) is not None
    finally:
        f.close()
    assert not_finished(live, live.stat().st_size) is None


# -------------------------------------------------------------------- neo's own writer (NIX)

def _write_nix(path: Path, sweeps: np.ndarray, fs: float, unit: str) -> Path:
    import quantities as pq
    from neo import AnalogSignal, Block, Segment
    from neo.io import NixIO
    ctx = _quiet()
    try:
        blk = Block(name="qcd test")
        for k, y in enumerate(sweeps):
            seg = Segment(index=k)
            seg.analogsignals.append(AnalogSignal(y[:, None], units=unit,
                                                  sampling_rate=fs * pq.Hz,
                                                  t_start=k * 2.0 * pq.s))
            blk.segments.append(seg)
        with NixIO(str(path), mode="ow") as io:
            io.write_block(blk)
    finally:
        ctx.__exit__(None, None, None)
    return path


def _measures_equal(a, b, rel: float) -> None:
    ma, mb = _numbers(a), _numbers(b)
    # float samples carry no converter rails: clipping_fraction is the ABF side's alone
    assert {k for k in ma.keys() - mb.keys()} == {(0, "clipping_fraction")}
    assert mb.keys() <= ma.keys()
    del ma[(0, "clipping_fraction")]
    for key in ma:
        assert mb[key] == pytest.approx(ma[key], rel=rel, abs=1e-12), key


def test_nix_written_by_neo_measures_as_the_abf_path(tmp_path):
    # the ABF file's own samples (read back by the native reader) written with neo's NIX
    # writer: the same signal through two formats gives the same measures
    fs = 10_000.0
    rng = np.random.default_rng(8)
    n = int(20 * fs)
    x = rng.normal(0, 2.0, n) + sine(n, fs, 1.0, 60.0)
    src = _write_abf1(tmp_path / "gapfree.abf", x[None, :], fs, gap_free=True)
    with open_recording(src) as rec:
        same = np.concatenate(list(rec.chunks(0)))
    nix = _write_nix(tmp_path / "gapfree.nix", same[None, :], fs, "pA")
    fa, fx = analyze_path(src), analyze_path(nix)
    assert fx.status == "ok" and fx.format == "neo .nix" and fx.gap_free
    _measures_equal(fa, fx, 1e-9)
    # episodic: the METHODS §1.1 cell, 6 sweeps, the step declared for both
    n_pre, n_step = 400, 2000
    sweeps = np.array([sampled_cell(-5e-3, 10e6, 500e6, 33e-12, 20e3, n_pre=n_pre,
                                    n_step=n_step, n_post=1600, filter_hz=5000.0,
                                    noise_sd=0.2e-12, rng=rng) for _ in range(6)]) * 1e12
    src = _write_abf1(tmp_path / "cell.abf", sweeps, 20e3)
    with open_recording(src) as rec:
        same = np.array([rec.sweep(0, k) for k in range(rec.n_sweeps)])
    nix = _write_nix(tmp_path / "cell.nix", same, 20e3, "pA")
    pulse = TestPulse(-5.0, n_pre / 20e3, n_step / 20e3)
    fa, fx = analyze_path(src, pulse=pulse), analyze_path(nix, pulse=pulse)
    assert fx.mode == "voltage_clamp" and fx.n_sweeps == 6
    _measures_equal(fa, fx, 1e-9)
    assert fx.channels[0].measures["access_resistance"].value == pytest.approx(10.0, rel=0.1)


# --------------------------------------------------------------------------- bad HDF5 files

def test_random_hdf5_corruptions_give_only_recording_errors(tmp_path):
    # seeded byte flips in a small NWB file's metadata, opened and read whole in a subprocess
    # under a 256 MB address-space limit (as the ABF corrupt-file table)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE.parent), str(HERE)]))
    out = subprocess.run([sys.executable, str(HERE / "badfiles.py"), "--hdf5", str(tmp_path),
                          "200", "256"], capture_output=True, text=True, timeout=240, env=env,
                         check=False)
    assert out.returncode == 0, out.stderr[-2000:]
    res = json.loads(out.stdout.splitlines()[-1])
    assert res["other"] == [] and sum(res["outcomes"].values()) == 200
    assert res["outcomes"].get("ok", 0) > 0 and res["outcomes"].get("bad_header", 0) > 0
    assert res["slowest"] < 3.0
