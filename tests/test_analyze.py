"""The one-pass analysis on every real recording (MANIFEST.md), on bad files, on synthetic ABF1
files written with pyabf's writer, and its independence from the reader's chunk size."""
from __future__ import annotations

import json
import math
import struct
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from badfiles import build as build_bad_files
from conftest import ABF_FILES, abf, require_data
from qcd.analyze import analyze, analyze_path
from qcd.results import MODES
from qcd.config import TestPulse
from qcd.recording import open_recording
from references import sampled_cell, sine

TEST_PULSE = ("access_resistance", "membrane_resistance", "membrane_capacitance", "tau",
              "access_change_pct", "seal_resistance", "input_resistance")
UNITS = {"pA", "nA", "mV", "V", "MOhm", "GOhm", "pF", "us", "ms", "s", "Hz", "pA/min",
         "mV/min", "%", ""}

# MANIFEST.md: recording mode per file (the channels' units and the paired command)
EXPECTED_MODE = {
    "cc_single_sweep_abf1.abf": "current_clamp", "cc_steps.abf": "current_clamp",
    "cc_steps_abf1.abf": "current_clamp", "cc_user_list_steps.abf": "current_clamp",
    "gapfree_cc_slow_drift.abf": "current_clamp", "fast_100khz_temperature.abf": "extracellular",
    "four_channel_no_cell.abf": "voltage_clamp", "four_channel_no_cell_abf1.abf": "voltage_clamp",
    "vc_cell_step.abf": "voltage_clamp", "vc_model_cell_step.abf": "voltage_clamp",
    "vc_step_family.abf": "voltage_clamp", "vc_tight_seal_noisy.abf": "voltage_clamp",
    "vc_units_A_no_protocol.abf": "voltage_clamp", "vc_step_abf1.abf": "voltage_clamp",
    "vc_holding_change_pressure.abf": "voltage_clamp",
    "vc_recorded_command_3ch.abf": "voltage_clamp", "vc_step_series_tagged.abf": "voltage_clamp",
    "vc_abf1_recorded_command_tags.abf": "voltage_clamp", "sine sweep unknown units.abf": "unknown",
}

_cache: dict[str, object] = {}


def measured(name: str):
    if name not in _cache:
        _cache[name] = analyze_path(abf(name), digest=False)
    return _cache[name]


def primary(fm):
    chans = {c.index: c for c in fm.channels}
    return chans[fm.extra["primary_channel"]]


@pytest.mark.parametrize("path", ABF_FILES, ids=[p.name for p in ABF_FILES])
def test_every_real_file_analyzes_ok(path):
    require_data()
    fm = measured(path.name)
    assert fm.status == "ok", fm.error
    assert fm.error_kind is None and fm.mode in MODES
    if path.name in EXPECTED_MODE:
        assert fm.mode == EXPECTED_MODE[path.name]
    doc = fm.to_json()
    json.dumps(doc)                      # JSON-able as it is
    for ch in doc["channels"]:
        for name, m in ch["measures"].items():
            assert m["unit"] in UNITS, (name, m["unit"])
        if ch["dimension"] in ("A", "V") and any("samples do not change" in n
                                                 for n in ch["notes"]):
            # zero noise only where the samples do not change: pyabf (the reference reader)
            # shows every sweep of the channel starting with a run of one value
            import pyabf
            ref = pyabf.ABF(str(path))
            for k in range(ref.sweepCount):
                ref.setSweep(k, channel=ch["index"])
                assert np.ptp(ref.sweepY[:100]) == 0, (ch["index"], k)
            assert ch["measures"]["noise_rms"]["value"] == 0
        elif ch["dimension"] in ("A", "V"):
            assert ch["measures"]["noise_rms"]["value"] > 0
            assert ch["measures"]["noise_rms"]["unit"] == ("pA" if ch["dimension"] == "A"
                                                           else "mV")
    assert doc["channels"] and len(doc["channels"]) == len(open_recording(path).channels)


def test_four_channel_no_cell_gives_no_whole_cell_values():
    # MANIFEST.md: four channels, no cell attached: must not be mistaken for a cell
    for name in ("four_channel_no_cell.abf", "four_channel_no_cell_abf1.abf"):
        fm = measured(name)
        for ch in fm.channels:
            for m in ("access_resistance", "membrane_resistance", "membrane_capacitance", "tau"):
                assert m not in ch.measures, (name, ch.index, m)


def test_step_family_is_not_a_test_pulse():
    # MANIFEST.md: a step whose size changes every sweep is not a test pulse
    ch = primary(measured("vc_step_family.abf"))
    assert not set(TEST_PULSE) & set(ch.measures)
    assert any("step family" in n for n in ch.notes)


def test_holding_change_is_not_a_test_pulse():
    # MANIFEST.md: a change of holding level (it never returns) is not a test pulse
    fm = measured("vc_holding_change_pressure.abf")
    for ch in fm.channels:
        assert not set(TEST_PULSE) & set(ch.measures)
    assert any("no test step" in n for n in primary(fm).notes)


def test_model_cell_gives_whole_cell_values():
    # docs/methods.md §2 typical model-cell values [M, from memory]:
    # whole-cell 10 MOhm + 500 MOhm || 33 pF
    ms = primary(measured("vc_model_cell_step.abf")).measures
    assert ms["access_resistance"].unit == "MOhm"
    assert ms["access_resistance"].value == pytest.approx(10.0, rel=0.2)
    assert ms["membrane_resistance"].value == pytest.approx(500.0, rel=0.1)
    assert ms["membrane_capacitance"].unit == "pF"
    assert ms["membrane_capacitance"].value == pytest.approx(33.0, rel=0.1)
    # tau = Cm Ra Rm / (Ra + Rm) = 323.5 us for those values (docs/methods.md §1.1 table)
    assert ms["tau"].unit == "us"
    assert ms["tau"].value == pytest.approx(323.5, rel=0.2)
    assert abs(ms["access_change_pct"].value) < 10.0      # a model circuit does not drift


def test_current_clamp_steps_give_input_resistance():
    ms = primary(measured("cc_steps.abf")).measures
    assert ms["input_resistance"].unit == "MOhm"
    assert 20.0 < ms["input_resistance"].value < 2000.0   # neurons: tens to hundreds of MOhm (P)
    assert "access_resistance" not in ms


def test_fast_file_shows_strong_60hz():
    # MANIFEST.md: fast_100khz_temperature.abf has strong 60 Hz
    ms = measured("fast_100khz_temperature.abf").channels[0].measures
    assert ms["line_hz"].value == pytest.approx(60.0, abs=0.1)
    assert ms["hum_rms"].unit == "mV" and ms["hum_rms"].value > 1.0
    # the fundamental alone is several mV, far above a mains-free floor at 1 Hz resolution
    assert ms["hum_fundamental_rms"].value > 1.0


def test_single_sweep_abf1_has_a_60hz_line_on_the_current_channel():
    # MANIFEST.md: a small 60 Hz line on the current channel
    fm = measured("cc_single_sweep_abf1.abf")
    cur = next(c for c in fm.channels if c.dimension == "A")
    assert cur.measures["line_hz"].value == pytest.approx(60.0, abs=0.1)
    assert cur.measures["hum_fraction"].value < 0.5


def test_cc_steps_abf1_has_a_weak_50hz_line():
    # MANIFEST.md: a weak 50 Hz line
    ms = primary(measured("cc_steps_abf1.abf")).measures
    assert ms["line_hz"].value == pytest.approx(50.0, abs=0.1)
    assert ms["hum_fraction"].value < 0.05


def test_units_given_as_amperes_at_picoampere_size_are_taken_as_pa():
    # MANIFEST.md: current stored with unit 'A' at picoampere-sized values
    fm = measured("vc_units_A_no_protocol.abf")
    assert any("picoampere" in n for n in fm.notes)
    ms = fm.channels[0].measures
    assert ms["noise_rms"].unit == "pA" and 0.01 < ms["noise_rms"].value < 100


def test_no_step_gives_a_note_and_no_test_pulse_measures():
    fm = measured("gapfree_cc_slow_drift.abf")
    ch = primary(fm)
    assert not set(TEST_PULSE) & set(ch.measures)
    assert any("no test step" in n or "gap-free" in n for n in ch.notes)
    assert "baseline_drift" in ch.measures and ch.measures["baseline_drift"].unit == "mV/min"


def test_spectrum_is_compact_and_in_display_units():
    ch = measured("gapfree_cc_slow_drift.abf").channels[0]
    sp = ch.spectrum
    assert sp is not None and sp.unit == "mV"
    assert 50 <= len(sp.freqs_hz) <= 210 and len(sp.freqs_hz) == len(sp.density)
    assert all(a < b for a, b in zip(sp.freqs_hz, sp.freqs_hz[1:]))
    # integral of the compact spectrum approximates the variance (Parseval, docs/methods.md §3.4)
    f = np.array(sp.freqs_hz)
    total = float(np.trapezoid(sp.density, f))
    assert total == pytest.approx(ch.measures["noise_rms"].value ** 2, rel=0.6)


# --- bad files ----------------------------------------------------------------------------------

def test_bad_files_give_error_status_with_specific_message(tmp_path):
    src = abf("vc_model_cell_step.abf")
    data = src.read_bytes()
    cases = {
        "truncated": (tmp_path / "cut.abf", data[:len(data) // 2]),
        "empty": (tmp_path / "zero.abf", b""),
        "bad_signature": (tmp_path / "sig.abf", b"QQQQ" + data[4:]),
    }
    for kind, (p, blob) in cases.items():
        p.write_bytes(blob)
    folder = tmp_path / "x.abf"
    folder.mkdir()
    cases["not_a_file"] = (folder, None)
    for kind, (p, _) in cases.items():
        fm = analyze_path(p)
        assert fm.status == "error" and fm.error_kind == kind, (kind, fm.error)
        assert str(p) in fm.error and "Traceback" not in fm.error
        assert fm.channels == ()


def test_corrupt_file_table_gives_the_expected_kinds(tmp_path):
    # the shared corrupt-file table (tests/badfiles.py), through the analysis entry point
    cases = build_bad_files(tmp_path, abf("vc_model_cell_step.abf"), abf("vc_step_abf1.abf"))
    for name, path, kind, what in cases:
        if name == "fifo_named_abf":
            continue                      # opening a FIFO is the reader's own test
        fm = analyze_path(path)
        assert fm.status == "error", (name, what)
        assert fm.error_kind == kind, (name, fm.error_kind, fm.error)


# --- synthetic files through the whole path ----------------------------------------------------

def _write_abf1(path: Path, sweeps: np.ndarray, fs: float, unit: str = "pA",
                gap_free: bool = False) -> None:
    import pyabf.abfWriter
    pyabf.abfWriter.writeABF1(np.ascontiguousarray(sweeps, dtype=float), str(path), fs, unit)
    if gap_free:
        with open(path, "r+b") as f:
            f.seek(8)
            f.write(struct.pack("<h", 3))      # nOperationMode 3: gap-free


def test_declared_pulse_gives_whole_cell_values(tmp_path):
    # no protocol in the file: the declared step (docs/methods.md §1.1 cell: Ra 10 MOhm,
    # Rm 500 MOhm, Cm 33 pF, dV -5 mV) is the test step; the charge method recovers the circuit
    fs = 20_000.0
    rng = np.random.default_rng(1)
    sweeps = np.array([sampled_cell(-5e-3, 10e6, 500e6, 33e-12, fs, n_pre=400, n_step=2000,
                                    n_post=1600, filter_hz=5000.0, noise_sd=0.2e-12, rng=rng)
                       for _ in range(6)]) * 1e12          # pA for the file
    path = tmp_path / "declared.abf"
    _write_abf1(path, sweeps, fs)
    plain = analyze_path(path)
    assert "access_resistance" not in plain.channels[0].measures
    fm = analyze_path(path, pulse=TestPulse(-5.0, 400 / fs, 2000 / fs))
    ch = fm.channels[0]
    assert fm.status == "ok" and fm.mode == "voltage_clamp"
    assert any("declared pulse" in n for n in ch.notes)
    assert ch.measures["access_resistance"].value == pytest.approx(10.0, rel=0.1)
    assert ch.measures["membrane_resistance"].value == pytest.approx(500.0, rel=0.05)
    assert ch.measures["membrane_capacitance"].value == pytest.approx(33.0, rel=0.1)


def test_gap_free_synthetic_file_measures_match_the_signal(tmp_path):
    # white noise 2 pA + 1.5 pA at 50.02 Hz, 40 s at 10 kHz, one event burst, written as ABF1
    fs = 10_000.0
    rng = np.random.default_rng(2)
    n = int(40 * fs)
    x = rng.normal(0, 2.0, n) + sine(n, fs, 1.5, 50.02)
    x[int(12.2 * fs):int(12.6 * fs)] += 60.0 * np.sin(np.linspace(0, 40, int(0.4 * fs)))
    path = tmp_path / "gapfree.abf"
    _write_abf1(path, x[None, :], fs, gap_free=True)
    fm = analyze_path(path)
    assert fm.gap_free and fm.status == "ok"
    ms = fm.channels[0].measures
    assert ms["event_blocks"].value == 1
    # noise: sqrt(2^2 + 1.5^2/2) (analytic), converter step 0.3 pA adds q^2/12
    assert ms["noise_rms"].value == pytest.approx(math.sqrt(4 + 1.125), rel=0.03)
    assert ms["line_hz"].value == pytest.approx(50.02, abs=0.05)
    assert ms["hum_rms"].value == pytest.approx(1.5 / math.sqrt(2), rel=0.05)
    assert ms["clipping_fraction"].value == 0.0
    assert ms["alias_risk"].value is True                    # white to Nyquist
    assert ms["pp_over_rms"].value == pytest.approx(7.7, rel=0.15)


def test_nan_samples_leave_their_windows_out_with_a_note(tmp_path):
    # a float-sample ABF2 (odd_sample_rate.abf) with NaN/inf written into its first sweep;
    # the data section starts at block (uint32 at byte 236 of the ABF2 header) * 512
    src = abf("odd_sample_rate.abf")
    blob = bytearray(src.read_bytes())
    start = struct.unpack_from("<I", blob, 236)[0] * 512
    bad = np.array([np.nan, np.inf, -np.inf] * 10, dtype="<f4").tobytes()
    blob[start + 400:start + 400 + len(bad)] = bad
    path = tmp_path / "nan.abf"
    path.write_bytes(bytes(blob))
    ref = analyze_path(src).channels[0].measures
    ch = analyze_path(path).channels[0]
    assert any("NaN" in n for n in ch.notes)
    assert math.isfinite(ch.measures["noise_rms"].value)
    assert ch.measures["noise_rms"].value == pytest.approx(ref["noise_rms"].value, rel=0.2)


def test_drift_does_not_count_in_noise_pp(tmp_path):
    # white noise on a steep ramp (50 sigma per second): noise_pp is taken of the detrended
    # window, so pp/rms stays at the Gaussian range of N = 1e4 samples, E[R]/sigma = 7.703
    # (docs/methods.md §3.3), and the drift shows in baseline_drift instead
    fs = 10_000.0
    n = int(20 * fs)
    x = np.random.default_rng(4).normal(0, 1.0, n) + 50.0 * np.arange(n) / fs
    path = tmp_path / "ramp.abf"
    _write_abf1(path, x[None, :], fs, gap_free=True)
    ms = analyze_path(path).channels[0].measures
    assert ms["pp_over_rms"].value == pytest.approx(7.703, rel=0.1)
    assert ms["baseline_drift"].unit == "pA/min"
    assert ms["baseline_drift"].value == pytest.approx(50.0 * 60, rel=0.01)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(size=st.integers(min_value=1, max_value=400_000))
def test_any_chunk_size_gives_the_same_measures(size):
    rec = open_recording(abf("gapfree_cc_slow_drift.abf"))
    ref = _reference()
    fm = analyze(rec, chunk_size=size)
    for a, b in zip(fm.channels, ref.channels):
        assert a.measures.keys() == b.measures.keys()
        for name in a.measures:
            va, vb = a.measures[name].value, b.measures[name].value
            if name == "spectral_lines":
                assert len(va) == len(vb)
                continue
            assert va == pytest.approx(vb, rel=1e-9, abs=1e-12), name


def _reference():
    if "_chunk_ref" not in _cache:
        _cache["_chunk_ref"] = analyze(open_recording(abf("gapfree_cc_slow_drift.abf")))
    return _cache["_chunk_ref"]


@pytest.mark.parametrize("name", ["gapfree_cc_slow_drift.abf", "gapfree_16_channels.abf"])
def test_single_precision_path_gives_the_measures_of_the_double_one(name, monkeypatch):
    # long gap-free files take their 16-bit samples through float32 (qcd.analyze's
    # _SINGLE_MIN_SAMPLES, here lowered to 0 so that the real files take that path): every
    # measure within float32 rounding of the float64 path's, the notes the same
    import qcd.analyze as an
    ref = analyze_path(abf(name), digest=False)
    monkeypatch.setattr(an, "_SINGLE_MIN_SAMPLES", 0)
    got = analyze_path(abf(name), digest=False)
    for a, b in zip(got.channels, ref.channels):
        assert a.measures.keys() == b.measures.keys() and a.notes == b.notes
        for key, m in a.measures.items():
            va, vb = m.value, b.measures[key].value
            if key == "spectral_lines":
                assert [f for f, _ in va] == [f for f, _ in vb]
                continue
            assert va == pytest.approx(vb, rel=1e-5, abs=1e-5 * abs(vb) + 1e-9), (a.index, key)


@pytest.mark.parametrize("name", ["gapfree_cc_slow_drift.abf", "gapfree_16_channels.abf",
                                  "fast_100khz_temperature.abf"])
def test_noise_from_the_spectrum_equals_its_time_domain_definition_on_real_files(name):
    # noise_rms and noise_rms_1k come from each 1 s block's rfft (Parseval); their definitions
    # are in the time domain: the SD of the block after removing its least-squares line, and
    # the same after an ideal zero-phase low-pass at 1 kHz. References: pyabf's samples (an
    # independent reader), numpy polyfit (nz.detrended_sd), the brick-wall filter applied and
    # inverted (nz.lowpass_sd), event blocks (SD > 3x the median, DESIGN) left out, medians
    require_data()
    import pyabf

    from qcd import units
    from qcd.measures import noise as nz
    ref = pyabf.ABF(str(abf(name)))
    fm = analyze_path(abf(name), digest=False)
    fs = ref.dataRate
    L = min(int(round(fs)), len(ref.data[0]))
    checked = 0
    for ch in fm.channels:
        ms = ch.measures
        if "noise_rms_1k" not in ms:
            continue
        x = ref.data[ch.index]
        blocks = x[:len(x) // L * L].reshape(-1, L)
        sd = np.array([nz.detrended_sd(b) for b in blocks])
        keep = ~nz.event_blocks(sd)
        lo = np.array([nz.lowpass_sd(b, fs, 1000.0) for b in blocks[keep]])
        si = units.to_si(1.0, ref.adcUnits[ch.index]) if ref.adcUnits[ch.index] in \
            units.FACTORS else 1.0
        for key, want in (("noise_rms", np.median(sd[keep])), ("noise_rms_1k", np.median(lo))):
            got = units.to_si(ms[key].value, ms[key].unit) if ms[key].unit else ms[key].value
            assert got == pytest.approx(want * si, rel=1e-6), (ch.index, key)
        checked += 1
    assert checked


def test_noise_rms_1k_and_bands_agree_with_time_domain_filters(tmp_path):
    # a practical zero-phase filter: scipy.signal.sosfiltfilt with an 8-pole Butterworth whose
    # squared response |H|^4 has a 1 kHz noise bandwidth (cutoff 1 kHz / 0.94355, the integral
    # of 1/(1+x^16)^2 over x >= 0, evaluated numerically) gives the same noise_rms_1k on white
    # noise within 1 % (a sloped spectrum moves a Butterworth away from the ideal filter)
    import scipy.integrate
    import scipy.signal as ss
    enbw = scipy.integrate.quad(lambda u: 1 / (1 + u ** 16) ** 2, 0, 50, limit=200)[0]
    fs, L = 20_000.0, 20_000
    rng = np.random.default_rng(21)
    x = rng.normal(0, 2.0, 30 * L)
    path = tmp_path / "white.abf"
    _write_abf1(path, x[None, :], fs, gap_free=True)
    fm = analyze_path(path, digest=False)
    got = fm.channels[0].measures["noise_rms_1k"].value
    import pyabf
    y = pyabf.ABF(str(path)).data[0]
    sos = ss.butter(8, 1000.0 / enbw, fs=fs, output="sos")
    sds = [np.std(ss.sosfiltfilt(sos, ss.detrend(b))) for b in y[:30 * L].reshape(30, L)]
    assert got == pytest.approx(float(np.median(sds)), rel=0.01)
    assert got == pytest.approx(2.0 * math.sqrt(1000.0 / (fs / 2)), rel=0.02)   # analytic
    # the bands come from the Welch PSD (Hann windows); their definition: the RMS of the
    # detrended blocks after an ideal zero-phase band-pass (bins outside zeroed, irfft), the
    # power averaged over blocks. The same within 1 % (window leakage at the band edges)
    ms = fm.channels[0].measures
    f = np.fft.rfftfreq(L, 1 / fs)
    X = np.fft.rfft(ss.detrend(y[:30 * L].reshape(30, L), axis=1), axis=1)
    for name, (lo, hi) in (("band_rms_0p5_10", (0.5, 10.0)), ("band_rms_10_70", (10.0, 70.0)),
                           ("band_rms_70_1k", (70.0, 1000.0)),
                           ("band_rms_1k_corner", (1000.0, 0.95 * fs / 2))):   # no corner
        band = np.where((f >= lo) & (f <= hi), X, 0)
        want = math.sqrt(float(np.mean(np.var(np.fft.irfft(band, n=L, axis=1), axis=1))))
        assert ms[name].value == pytest.approx(want, rel=0.01), name


@pytest.mark.parametrize("single", [False, True])
def test_constant_channel_gives_zero_noise_and_says_why_no_spectrum(tmp_path, monkeypatch,
                                                                  single):
    # analytic: samples that never change have zero variance; rounding in either precision
    # must not turn into a noise value, a corner frequency or a "no mains line" finding
    import qcd.analyze as an
    if single:
        monkeypatch.setattr(an, "_SINGLE_MIN_SAMPLES", 0)
    path = tmp_path / "flat.abf"
    _write_abf1(path, np.full((1, 50_000), 12.5), 10_000.0, gap_free=True)
    ch = analyze_path(path, digest=False).channels[0]
    ms = ch.measures
    assert ms["noise_rms"].value == ms["noise_rms_1k"].value == ms["noise_pp"].value == 0.0
    assert ms["holding"].value == pytest.approx(12.5, abs=0.05)     # int16 steps of the writer
    assert not {"pp_over_rms", "corner_hz", "hum_rms_max", "band_rms_70_1k"} & set(ms)
    assert any("samples do not change" in n for n in ch.notes)
    assert not any("mains line" in n or "corner_hz" in n for n in ch.notes)


def test_declared_mains_gives_hum_on_short_episodic_baselines():
    # vc_cell_step.abf: 192 ms stretches at holding give 5 Hz bins, too coarse for the PSD
    # method (which needs <= 2 Hz); with the mains declared, the least-squares fit measures it
    path = abf("vc_cell_step.abf")
    plain = analyze_path(path).channels[0]
    assert "hum_rms" not in plain.measures
    assert any("mains_hz" in n for n in plain.notes)
    fitted = analyze_path(path, mains_hz=60.0).channels[0]
    ms = fitted.measures
    assert any("least squares" in n for n in fitted.notes)
    assert ms["hum_rms"].unit == ms["hum_rms_se"].unit == "pA"
    assert 0 <= ms["hum_fundamental_rms"].value <= ms["hum_rms"].value + 1e-12
    # hum power is a part of the baseline variance (Parseval): the fraction lies in [0, 1)
    assert 0 <= ms["hum_fraction"].value < 1
    # this cell's floor near 60 Hz (about 0.1 pA^2/Hz, steep below it) is far above any line
    # there: the fit finds no hum it can tell from the floor, and says how much there could
    # be (less than the baseline's own RMS: Parseval)
    assert ms["hum_rms"].value <= ms["hum_rms_max"].value < ms["noise_rms"].value
    assert ms["hum_rms_max"].unit == "pA"
    assert any("hum_rms_max" in n for n in fitted.notes)


def _write_counts_abf1(path: Path, counts: np.ndarray, fs: float) -> None:
    """A gap-free ABF1 holding the given int16 converter counts as they are (pyabf's writer
    for the header, nOperationMode 3, the samples after its 2048-byte header)."""
    import pyabf.abfWriter
    pyabf.abfWriter.writeABF1(np.zeros((1, 1024)) + 100.0, str(path), fs, "pA")
    with open(path, "r+b") as f:
        f.seek(8)
        f.write(struct.pack("<h", 3))                      # gap-free
        for at, value in ((10, len(counts)), (16, 1), (138, len(counts))):
            f.seek(at)                      # lActualAcqLength, lActualEpisodes, per episode
            f.write(struct.pack("<i", value))
        f.truncate(2048)
        f.seek(2048)
        f.write(np.asarray(counts, dtype="<i2").tobytes())


@pytest.mark.parametrize("single", [False, True])
def test_gap_free_clipping_counts_every_sample_at_a_rail(tmp_path, monkeypatch, single):
    # the converter's rails are its most negative and most positive counts (16 bits: -32768
    # and 32767); the reference is the count of such samples taken directly on the integers
    import qcd.analyze as an
    if single:
        monkeypatch.setattr(an, "_SINGLE_MIN_SAMPLES", 0)
    fs, L = 10_000.0, 10_000
    rng = np.random.default_rng(5)
    x = np.rint(rng.normal(0, 300, 12 * L)).astype(np.int64)
    x[2 * L + 17] = 32767                                   # single samples at each rail
    x[5 * L + 3:5 * L + 40] = -32768                        # a run at the low rail
    ramp = np.linspace(-32000, 33500, L)                    # a steep line into the high rail
    x[7 * L:8 * L] = np.rint(ramp + rng.normal(0, 3, L))
    x[9 * L:10 * L] = np.rint(np.linspace(-31000, 31000, L))   # steep, never at a rail
    x = np.clip(x, -32768, 32767)
    path = tmp_path / "rails.abf"
    _write_counts_abf1(path, x, fs)
    ms = analyze_path(path, digest=False).channels[0].measures
    expected = np.count_nonzero((x >= 32767) | (x <= -32768)) / len(x)
    assert expected > 0
    assert ms["clipping_fraction"].value == expected


@pytest.mark.parametrize("single", [False, True])
def test_a_line_in_every_window_is_not_taken_for_samples_that_do_not_change(
        tmp_path, monkeypatch, single):
    # analytic: an exact integer ramp in each 1 s window leaves a residual of zero after the
    # window's least-squares line, yet its samples change; only a constant is "flat"
    import qcd.analyze as an
    if single:
        monkeypatch.setattr(an, "_SINGLE_MIN_SAMPLES", 0)
    L = 5000
    x = np.tile(np.arange(L) - L // 2, 6)
    path = tmp_path / "ramps.abf"
    _write_counts_abf1(path, x, 5000.0)
    ch = analyze_path(path, digest=False).channels[0]
    assert not any("samples do not change" in n for n in ch.notes)
    import pyabf                                          # reference reader for the scale
    window_sd = float(np.std(pyabf.ABF(str(path)).data[0][:L]))
    assert window_sd > 0
    assert ch.measures["noise_rms"].value < 1e-4 * window_sd


@pytest.mark.parametrize("single", [False, True])
def test_event_blocks_read_again_leave_the_psd_of_welch_without_them(single):
    # gap-free blocks keep no spectra while streaming: the PSD takes the event blocks out by
    # transforming their samples again (Blocks.reread). Reference: scipy.signal.welch (Hann,
    # 1 s segments, no overlap, linear detrend) of the blocks without events. 25 events in 60
    # blocks, more than the 16 loudest spectra a channel of a 16-channel file used to keep
    import scipy.signal as ss

    from qcd.blocks import Blocks
    from qcd.measures import noise as nz
    fs, L, n = 2000.0, 2000, 60
    rng = np.random.default_rng(31)
    x = np.rint(rng.normal(300, 40, (n, L))).astype(np.int16)
    events = sorted(int(i) for i in rng.choice(n, 25, replace=False))
    x[events] += np.rint(400 * np.sin(np.linspace(0, 50, L))).astype(np.int16)
    raw = x.ravel()
    asked: list[int] = []

    def reread(starts):
        asked.extend(int(s) for s in starts)
        return np.stack([raw[s:s + L] for s in starts])

    acc = Blocks(L, fs, reread=reread, single=single)
    for part in np.array_split(np.arange(n), [7, 30]):
        acc.add(x[part], (part * L + L / 2) / fs)
    found = nz.event_blocks(np.concatenate(acc.parts["sd"]))
    assert list(np.flatnonzero(found)) == events
    P, k = acc.psd(frozenset(events))
    _, Pw = ss.welch(np.delete(x, events, axis=0).astype(float).ravel(), fs, window="hann",
                     nperseg=L, noverlap=0, detrend="linear")
    assert k == n - 25 and acc.welch.exact and asked == [e * L for e in events]
    if not single:
        np.testing.assert_allclose(P, Pw, rtol=1e-9, atol=1e-9 * Pw.max())
        return
    # float32 transforms: the PSD with the event spectra kept while streaming (the same
    # transform of the same samples), up to the order of the float64 sums; both differ from
    # float64 Welch by the float32 rounding of the event blocks' power (about 1e-7 of it; the
    # events are 100x the noise)
    kept = Blocks(L, fs, single=True)
    for part in np.array_split(np.arange(n), [7, 30]):
        kept.add(x[part], (part * L + L / 2) / fs)
    np.testing.assert_allclose(P, kept.psd(frozenset(events))[0], rtol=1e-10)
    np.testing.assert_allclose(P, Pw, rtol=1e-2)


@pytest.mark.parametrize("single", [False, True])
def test_channels_sharing_work_buffers_measure_as_alone(single):
    # the channels of one file share their transform's work buffers (fed one after the other):
    # each channel's block values and PSD are exactly those of a channel measured alone
    from qcd.blocks import Blocks
    fs, L = 2000.0, 2000
    rng = np.random.default_rng(32)
    data = [np.rint(rng.normal(m, s, (30, L))).astype(np.int16) for m, s in ((0, 50), (900, 7))]
    shared: dict = {}
    together = [Blocks(L, fs, single=single, shared=shared) for _ in data]
    alone = [Blocks(L, fs, single=single) for _ in data]
    for part in np.array_split(np.arange(30), [4, 17]):
        t0 = (part * L + L / 2) / fs
        for x, a, b in zip(data, together, alone):
            a.add(x[part], t0)
        for x, b in zip(data, alone):
            b.add(x[part], t0)
    for a, b in zip(together, alone):
        for key, v in a.arrays().items():
            np.testing.assert_array_equal(v, b.arrays()[key])
        np.testing.assert_array_equal(a.psd(frozenset())[0], b.psd(frozenset())[0])


def test_event_blocks_of_a_real_recording_leave_its_psd_as_welch_without_them(tmp_path):
    # the real gap-free recording with a large burst written into its current channel in
    # three 1 s blocks: those blocks are events (SD > 3x the median, DESIGN), read again from
    # the file and taken out of the PSD. Reference: scipy.signal.welch (Hann, 1 s segments, no
    # overlap, linear detrend) of pyabf's samples of the other blocks, compacted as qcd stores
    # a spectrum (qcd.measures.spectrum.compact_spectrum)
    require_data()
    import pyabf
    import scipy.signal as ss

    from qcd.measures import noise as nz
    from qcd.measures import spectrum as sp
    src = abf("gapfree_cc_slow_drift.abf")
    head = pyabf.ABF(str(src), loadData=False)
    k, fs = head.channelCount, head.dataRate
    assert head.dataPointByteSize == 2                      # int16 samples, interleaved
    blob = bytearray(src.read_bytes())
    data = np.frombuffer(blob, dtype="<i2", offset=head.dataByteStart,
                         count=head.dataPointCount).reshape(-1, k).copy()
    L = int(fs)
    burst = np.rint(8000 * np.sin(np.linspace(0, 60, L))).astype(np.int32)
    for b in (3, 7, 11):
        col = data[b * L:(b + 1) * L, 1].astype(np.int32) + burst
        data[b * L:(b + 1) * L, 1] = np.clip(col, -32768, 32767)
    blob[head.dataByteStart:head.dataByteStart + data.nbytes] = data.tobytes()
    path = tmp_path / "bursts.abf"
    path.write_bytes(bytes(blob))
    ch = analyze_path(path, digest=False).channels[1]
    assert ch.measures["event_blocks"].value == 3
    y = pyabf.ABF(str(path)).data[1].astype(np.float64)     # pyabf scales in float32
    blocks = y[:len(y) // L * L].reshape(-1, L)
    sd = np.array([nz.detrended_sd(b) for b in blocks])
    keep = ~nz.event_blocks(sd)
    assert list(np.flatnonzero(~keep)) == [3, 7, 11]
    f, P = ss.welch(blocks[keep].ravel(), fs, window="hann", nperseg=L, noverlap=0,
                    detrend="linear")
    cf, cd = sp.compact_spectrum(f, P)
    assert ch.spectrum.unit == "pA"                         # pyabf's unit of this channel
    np.testing.assert_allclose(ch.spectrum.freqs_hz, cf, rtol=1e-12)
    np.testing.assert_allclose(ch.spectrum.density, cd, rtol=1e-6)    # float32 samples
