"""Noise, spectrum and drift measures against analytic results, METHODS.md check values and
scipy as a reference library. Values in pA are plain numbers here (the functions are linear and
unit-free); SI conversion is tested in test_analyze.py."""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as ss
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from qcd.measures import drift
from qcd.measures import noise as nz
from qcd.measures import spectrum as sp
from references import analog_bessel_noise, johnson_density, sine, white_noise


def _psd(x: np.ndarray, fs: float, L: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Streaming Welch PSD of x in L-sample blocks, fed in uneven pieces."""
    nb = len(x) // L
    acc = sp.WelchAccumulator(L, fs)
    blocks = x[:nb * L].reshape(nb, L)
    for part in np.array_split(blocks, min(3, nb)):
        X, _, _ = sp.block_fft(part)
        acc.add(X, np.ones(len(part)))
    P, k = acc.psd()
    return np.arange(L // 2 + 1) * fs / L, P, k


def _methods_42_signal(f1: float = 50.0, seed: int = 0, fs: float = 10_000.0, dur: float = 60.0):
    """METHODS §4.2 worked example: 1.0 pA at f1 + 0.3 pA at 3 f1 + white sigma 0.5 pA."""
    rng = np.random.default_rng(seed)
    n = int(fs * dur)
    return (sine(n, fs, 1.0, f1) + sine(n, fs, 0.3, 3 * f1, 0.7)
            + rng.normal(0.0, 0.5, n)), fs


# --- time-domain definitions --------------------------------------------------------------

def test_sine_rms_is_amplitude_over_root_two():
    # analytic: RMS of A sin(wt) over whole periods is A/sqrt(2)
    x = sine(10_000, 10_000.0, 3.0, 50.0)
    assert nz.rms(x) == pytest.approx(3.0 / math.sqrt(2), rel=1e-9)
    # the block SD (Parseval on the detrended rfft) sees the same; the removed line takes a
    # negligible part of a sine over 50 whole periods
    X, _, _ = sp.block_fft(x[None, :])
    sd, _ = nz.parseval_sd(X, len(x), 10_000.0)
    assert sd[0] == pytest.approx(3.0 / math.sqrt(2), rel=1e-3)


@pytest.mark.parametrize("n", [1000, 1001, 20_000])
def test_block_sd_equals_time_domain_detrend_and_brick_wall_lowpass(n):
    # reference: numpy polyfit detrend, and irfft with bins above 1 kHz zeroed (an ideal
    # zero-phase low-pass); the one-rfft path must give the same numbers
    rng = np.random.default_rng(n)
    fs = 10_000.0
    x = rng.normal(0, 1, (3, n)) + np.linspace(0, 40, n)[None, :] + 7.0
    X, mean, slope = sp.block_fft(x)
    sd, sd1k = nz.parseval_sd(X, n, fs, band_hz=1000.0)
    for i in range(3):
        assert sd[i] == pytest.approx(nz.detrended_sd(x[i]), rel=1e-10)
        assert sd1k[i] == pytest.approx(nz.lowpass_sd(x[i], fs, 1000.0), rel=1e-10)
        assert mean[i] == pytest.approx(x[i].mean(), rel=1e-12)
        assert np.std(ss.detrend(x[i])) == pytest.approx(sd[i], rel=1e-10)   # scipy reference


def test_peak_to_peak_of_gaussian_noise_matches_expected_range():
    # METHODS §3.3 (Tippett 1925): E[R]/sigma = 7.703 for N = 1e4, 5-95 % band 7.07-8.45
    rng = np.random.default_rng(11)
    x = rng.normal(0, 1, (300, 10_000))
    pp, _, _ = nz.peak_to_peak(x)
    assert pp.mean() == pytest.approx(7.703, abs=0.08)
    inside = np.mean((pp >= 7.07) & (pp <= 8.45))
    assert 0.84 <= inside <= 0.96


def test_clipping_count_and_event_blocks():
    x = np.array([0.0, 9.99, 10.0, -10.0, 3.0, 12.0])
    assert nz.clipping_count(x, (-10.0, 10.0)) == 3          # at or beyond the rails
    assert nz.clipping_count(x[:2], (-10.0, 10.0)) == 0
    sd = np.array([1.0, 1.1, 0.9, 1.0, 3.5, 1.05])            # 3.5 > 3 x median (DESIGN)
    assert nz.event_blocks(sd).tolist() == [False] * 4 + [True, False]


# --- Welch and Parseval -----------------------------------------------------------------------

def test_streaming_psd_equals_scipy_welch():
    # reference library: scipy.signal.welch with the same segments (Hann, 1 s, no overlap,
    # linear detrend per segment)
    rng = np.random.default_rng(5)
    fs = 5000.0
    x = rng.normal(0, 1, 60_000) + np.linspace(0, 10, 60_000) + sine(60_000, fs, 2.0, 123.4)
    f, P, k = _psd(x, fs, 5000)
    fw, Pw = ss.welch(x, fs, window="hann", nperseg=5000, noverlap=0, detrend="linear")
    assert k == 12
    np.testing.assert_allclose(f, fw)
    np.testing.assert_allclose(P, Pw, rtol=1e-9, atol=1e-12 * Pw.max())


def test_excluded_blocks_leave_the_psd_exactly():
    rng = np.random.default_rng(6)
    fs, L = 1000.0, 1000
    x = rng.normal(0, 1, (10, L))
    x[4] += 50 * np.sin(np.linspace(0, 30, L))       # an event block
    acc = sp.WelchAccumulator(L, fs)
    X, _, _ = sp.block_fft(x)
    sd, _ = nz.parseval_sd(X, L, fs)
    acc.add(X, sd)
    P, k = acc.psd(frozenset({4}))
    _, Pw = ss.welch(np.delete(x, 4, axis=0).ravel(), fs, window="hann", nperseg=L,
                     noverlap=0, detrend="linear")
    assert k == 9 and acc.exact
    np.testing.assert_allclose(P, Pw, rtol=1e-9, atol=1e-12 * Pw.max())


def test_loudest_blocks_kept_in_few_slots_leave_the_psd_exactly():
    # 16 slots (the smallest keep) for 200 blocks fed in uneven pieces: the 5 event blocks are
    # among the loudest kept, so taking them out is exact; reference scipy.signal.welch of the
    # blocks without them (Hann, no overlap, linear detrend)
    rng = np.random.default_rng(7)
    fs, L = 1000.0, 500
    x = rng.normal(0, 1, (200, L)) * rng.uniform(0.8, 1.2, (200, 1))
    events = [3, 40, 41, 150, 199]
    for i in events:
        x[i] += 30 * np.sin(np.linspace(0, 20, L))
    acc = sp.WelchAccumulator(L, fs, keep_bytes=1)
    assert acc.keep == 16
    for part in np.array_split(np.arange(200), [7, 8, 60, 130]):
        X, _, _ = sp.block_fft(x[part])
        sd, _ = nz.parseval_sd(X, L, fs)
        acc.add(X, sd)
    P, k = acc.psd(frozenset(events))
    _, Pw = ss.welch(np.delete(x, events, axis=0).ravel(), fs, window="hann", nperseg=L,
                     noverlap=0, detrend="linear")
    assert k == 195 and acc.exact
    np.testing.assert_allclose(P, Pw, rtol=1e-9, atol=1e-12 * Pw.max())


def test_single_precision_transform_equals_scipy_fft():
    # the compiled transform loaded straight from scipy's file against the public scipy.fft.rfft
    import scipy.fft
    r2c = sp._single_rfft()
    x = np.random.default_rng(3).normal(0, 100, (5, 1001)).astype(np.float32)
    assert np.array_equal(r2c(x), scipy.fft.rfft(x, axis=1))
    out = np.empty((5, 501), dtype=np.complex64)          # written into a reused buffer
    got = r2c(x, out)
    assert np.shares_memory(got, out) and np.array_equal(out, scipy.fft.rfft(x, axis=1))


def test_parseval_psd_integral_equals_variance_on_methods_signal():
    # METHODS §3.4 check on the §4.2 signal: var = 0.7953, sum P df = 0.7958 (theory 0.795)
    x, fs = _methods_42_signal()
    f, P, _ = _psd(x, fs, 10_000)
    var = float(np.var(x))
    assert var == pytest.approx(0.795, rel=0.01)
    assert float(P.sum() * (f[1] - f[0])) == pytest.approx(var, rel=0.005)


# --- thermal noise, bands ----------------------------------------------------------------------

def test_johnson_noise_of_500_megaohm_in_1khz_band():
    # METHODS §3.1 table (Johnson 1928; Nyquist 1928): 500 MOhm at 295 K, sqrt(S) = 5.708
    # fA/sqrt(Hz); brick-wall 1 kHz 0.1805 pA, 10 kHz 0.5708 pA
    S = johnson_density(500e6)
    assert math.sqrt(S) == pytest.approx(5.708e-15, rel=1e-3, abs=0)
    rng = np.random.default_rng(8)
    fs, L = 20_000.0, 20_000
    x = white_noise(rng, 40 * L, fs, S)
    X, _, _ = sp.block_fft(x.reshape(40, L))
    sd, sd1k = nz.parseval_sd(X, L, fs, 1000.0)
    assert float(np.median(sd1k)) == pytest.approx(0.1805e-12, rel=0.02, abs=0)
    # fs 20 kHz: the whole band is 0-10 kHz, so the table's 10 kHz value
    assert float(np.median(sd)) == pytest.approx(0.5708e-12, rel=0.02, abs=0)
    f, P, k = _psd(x, fs, L)
    # band RMS = sqrt(S * bandwidth) (METHODS §3.2 check: 5e-5 pA^2/Hz over 1 kHz = 0.2236 pA)
    assert sp.band_rms(f, P, 70.0, 1000.0) == pytest.approx(math.sqrt(S * 930.0), rel=0.02, abs=0)
    assert sp.band_rms(f, P, 1000.0, 10_000.0) == pytest.approx(math.sqrt(S * 9000), rel=0.02, abs=0)


def test_band_rms_leaves_mains_bins_out():
    # white 5e-5 pA^2/Hz (METHODS §3.2: 0.2236 pA over 1 kHz) plus strong hum in the band
    rng = np.random.default_rng(9)
    fs = 10_000.0
    x = white_noise(rng, 300_000, fs, 5e-5)
    hummed = x + sine(len(x), fs, 2.0, 50.0) + sine(len(x), fs, 1.0, 150.0)
    f, P, k = _psd(hummed, fs, 10_000)
    assert sp.band_rms(f, P, 0.5, 1000.0, line_hz=50.0) == pytest.approx(0.2236, rel=0.03)
    assert sp.band_rms(f, P, 0.5, 1000.0) > 1.0            # without removal the hum counts


def test_spectral_lines_find_non_mains_peaks():
    rng = np.random.default_rng(10)
    fs = 10_000.0
    x = rng.normal(0, 0.5, 300_000) + sine(300_000, fs, 0.4, 1234.0) + sine(300_000, fs, 1.0, 50.0)
    f, P, k = _psd(x, fs, 10_000)
    lines = sp.spectral_lines(f, P, k_segments=k, line_hz=50.0)
    assert len(lines) >= 1
    assert lines[0][0] == pytest.approx(1234.0, abs=1.0)
    assert lines[0][1] == pytest.approx(0.4 / math.sqrt(2), rel=0.1)
    assert all(abs(fq - 50.0 * round(fq / 50.0)) > 3 for fq, _ in lines)


# --- sampling and anti-aliasing ---------------------------------------------------------------

def test_alias_ratio_flat_white_noise_is_a_risk():
    # METHODS §5: unfiltered white noise R = -0.1 dB; flag R > -6 dB
    rng = np.random.default_rng(12)
    f, P, _ = _psd(rng.normal(0, 1, 200_000), 10_000.0, 10_000)
    r = sp.alias_ratio_db(f, P)
    assert abs(r) < 0.5 and r > sp.ALIAS_LIMIT_DB


@pytest.mark.parametrize("ratio, expected_db", [(10, -36.6), (5, -14.9)])
def test_alias_ratio_of_bessel_filtered_noise(ratio, expected_db):
    # METHODS §5 spectral test on synthetic white noise: Bessel-4 at fs = 10 fc -> -36.6 dB,
    # fs = 5 fc -> -14.9 dB (simulated values; theory -15.7); no alias risk at 10 fc
    fs = 20_000.0
    x = analog_bessel_noise(np.random.default_rng(13), 400_000, fs, fs / ratio)
    f, P, _ = _psd(x, fs, 20_000)
    r = sp.alias_ratio_db(f, P)
    assert r == pytest.approx(expected_db, abs=1.5)
    if ratio == 10:
        assert r < sp.ALIAS_LIMIT_DB


@pytest.mark.parametrize("fc, expected", [(2000.0, 2046.0), (4000.0, 3931.0)])
def test_corner_of_bessel_filtered_noise(fc, expected):
    # METHODS §5 corner estimate: 2046 Hz for a 2 kHz and 3931 Hz for a 4 kHz 4-pole Bessel
    # (the sample rate is not stated there; 20 kHz here), within a few percent
    fs = 20_000.0
    x = analog_bessel_noise(np.random.default_rng(int(fc)), 1_200_000, fs, fc)
    f, P, k = _psd(x, fs, 20_000)
    assert sp.corner_hz(f, P, k) == pytest.approx(expected, rel=0.03)


def test_no_corner_when_flat_to_nyquist():
    rng = np.random.default_rng(14)
    f, P, k = _psd(rng.normal(0, 1, 200_000), 10_000.0, 10_000)
    assert sp.corner_hz(f, P, k) is None


# --- drift -----------------------------------------------------------------------------------

def test_theil_sen_methods_6_check():
    # METHODS §6: y = -50 - 3 t pA, t = 0..10 min, t = 9 replaced by +500 pA:
    # Theil-Sen -3.00 pA/min, least squares +17.98 (numpy polyfit as the reference)
    t = np.arange(11.0)
    y = -50.0 - 3.0 * t
    y[9] = 500.0
    assert drift.theil_sen(t, y)[0] == pytest.approx(-3.00, abs=1e-9)
    assert np.polyfit(t, y, 1)[0] == pytest.approx(17.98, abs=0.01)
    assert drift.theil_sen(t, y)[0] == pytest.approx(scipy.stats.theilslopes(y, t)[0])


def test_theil_sen_is_the_median_of_every_pairwise_slope():
    # the definition (Theil 1950; Sen 1968), written out with numpy's pair indices, and
    # scipy.stats.theilslopes as the reference; equal times (a pair with no slope) left out
    rng = np.random.default_rng(6)
    for n, ties in ((2, False), (3, False), (200, False), (201, True), (1000, False)):
        t = np.sort(rng.uniform(0.0, 600.0, n))
        if ties:
            t[10:14] = t[10]
        y = rng.standard_normal(n) + 0.01 * t
        i, j = np.triu_indices(n, k=1)
        ok = t[j] != t[i]
        want = float(np.median((y[j] - y[i])[ok] / (t[j] - t[i])[ok]))
        assert drift.theil_sen(t, y)[0] == want
        assert drift.theil_sen(t, y)[0] == pytest.approx(scipy.stats.theilslopes(y, t)[0],
                                                         rel=1e-12)
    with pytest.raises(ValueError):
        drift.theil_sen(np.ones(5), np.arange(5.0))


def test_pairwise_slopes_are_the_definition_bit_for_bit():
    # every pair i < j in numpy.triu_indices order, (y[j] - y[i]) / (t[j] - t[i]), pairs of
    # equal times left out: strictly increasing times (the row-by-row division), times with
    # ties and unsorted times (the general path)
    rng = np.random.default_rng(62)
    for n in (2, 3, 50, 1000):
        t = np.sort(rng.uniform(0.0, 600.0, n))
        cases = [t]
        if n > 3:
            tied = t.copy()
            tied[1:3] = tied[1]
            cases += [tied, rng.permutation(t)]
        for tt in cases:
            y = np.round(rng.standard_normal(n), 2)
            i, j = np.triu_indices(n, k=1)
            ok = tt[j] != tt[i]
            want = (y[j] - y[i])[ok] / (tt[j] - tt[i])[ok]
            got = drift._pairwise_slopes(tt, y)
            assert got.tobytes() == want.tobytes()


def test_flat_median_is_numpy_median_bit_for_bit():
    # numpy.median as the reference: odd and even sizes, repeated values (rounded data give
    # equal slopes), infinities and a NaN (numpy's answer NaN)
    rng = np.random.default_rng(61)
    for n in (2, 3, 4, 5, 10, 11, 999, 1000, 4001, 499_500):
        for rounded in (False, True):
            v = rng.standard_normal(n) * 3.0
            if rounded:
                v = np.round(v, 1)
            want = np.median(v)
            got = drift._flat_median(v.copy())
            assert np.float64(got).tobytes() == np.float64(want).tobytes(), (n, rounded)
    v = rng.standard_normal(100)
    v[[3, 70]] = np.inf
    v[5] = -np.inf
    assert drift._flat_median(v.copy()) == np.median(v)
    v[40] = np.nan
    with np.errstate(invalid="ignore"):
        assert np.isnan(drift._flat_median(v.copy())) and np.isnan(np.median(v))


def test_baseline_drift_pools_long_series():
    # per second in, the slope is kept when thousands of windows are pooled
    rng = np.random.default_rng(15)
    t = np.arange(5000.0)
    y = 2.0 + 0.01 * t + rng.normal(0, 0.5, len(t))
    assert drift.baseline_drift(t, y) == pytest.approx(0.01, rel=0.02)
    assert drift.baseline_drift(t[:2], y[:2]) is None


@pytest.mark.parametrize("n", [1000, 1001, 1800, 2999, 5000])
def test_pooled_medians_equal_array_split_groups(n):
    # reference: numpy.array_split into MAX_POINTS consecutive groups, numpy.median of each
    rng = np.random.default_rng(n)
    t, y = np.arange(float(n)), rng.normal(0, 1, n)
    groups = np.array_split(np.arange(n), drift.MAX_POINTS)
    pt, py = drift._pool(t, y, drift.MAX_POINTS)
    assert np.array_equal(pt, [np.median(t[g]) for g in groups])
    assert np.array_equal(py, [np.median(y[g]) for g in groups])


# --- single precision ----------------------------------------------------------------------------

@pytest.mark.parametrize("L", [2000, 2001])
def test_single_precision_blocks_match_scipy_welch_and_the_time_domain(L):
    # 16-bit converter counts (white noise, a 60 Hz line, a ramp, an offset near the top of
    # the range) through the float32 path; references: numpy polyfit detrend and the brick-wall
    # irfft low-pass in float64 (nz.detrended_sd / nz.lowpass_sd), scipy.signal.welch (Hann,
    # no overlap, linear detrend). float32 keeps about 7 digits: sums agree to 1e-5
    rng = np.random.default_rng(L)
    fs, nb = 10_000.0, 12
    t = np.arange(nb * L) / fs
    x = 20_000 + rng.normal(0, 40, nb * L) + 300 * np.sin(2 * np.pi * 60 * t) + 500 * t
    counts = np.clip(np.rint(x), -32768, 32767).astype(np.int16).reshape(nb, L)
    f64 = counts.astype(np.float64)
    fft = sp.BlockFFT(L, single=True)
    X, mean, slope = fft(counts, np.median(counts, axis=1))
    assert X.dtype == np.complex64
    sd, sd1k = nz.parseval_sd(X, L, fs)
    for i in range(nb):
        assert sd[i] == pytest.approx(nz.detrended_sd(f64[i]), rel=1e-5)
        assert sd1k[i] == pytest.approx(nz.lowpass_sd(f64[i], fs, 1000.0), rel=1e-5)
        assert mean[i] == pytest.approx(f64[i].mean(), rel=1e-9)
        assert slope[i] == pytest.approx(np.polyfit(np.arange(L), f64[i], 1)[0], rel=1e-5)
    acc = sp.WelchAccumulator(L, fs)
    acc.add(X, sd)
    P, k = acc.psd()
    _, Pw = ss.welch(f64.ravel(), fs, window="hann", nperseg=L, noverlap=0, detrend="linear")
    assert k == nb
    np.testing.assert_allclose(P, Pw, rtol=1e-4, atol=1e-6 * Pw.max())
    assert P.sum() == pytest.approx(Pw.sum(), rel=1e-5)


def test_single_precision_constant_blocks_give_exactly_zero():
    # a constant channel (a disconnected input at one converter step): no rounding noise
    counts = np.full((4, 1000), 1234, dtype=np.int16)
    X, mean, slope = sp.BlockFFT(1000, single=True)(counts, np.median(counts, axis=1))
    sd, sd1k = nz.parseval_sd(X, 1000, 10_000.0)
    assert not sd.any() and not sd1k.any() and not slope.any()
    assert (mean == 1234).all()


# --- chunking ----------------------------------------------------------------------------------

@settings(max_examples=25, deadline=None)
@given(cuts=st.lists(st.integers(min_value=1, max_value=19), min_size=0, max_size=6,
                     unique=True))
def test_any_split_into_pieces_gives_the_same_psd_and_block_values(cuts):
    # the accumulator sums blocks: how the stream is cut into pieces must not matter
    rng = np.random.default_rng(16)
    fs, L = 2000.0, 500
    x = rng.normal(0, 1, (20, L)) + sine(20 * L, fs, 0.5, 60.0).reshape(20, L)
    one = sp.WelchAccumulator(L, fs)
    X, _, _ = sp.block_fft(x)
    sd_all, _ = nz.parseval_sd(X, L, fs)
    one.add(X, sd_all)
    many = sp.WelchAccumulator(L, fs)
    sds = []
    for part in np.split(x, sorted(cuts)):
        Xp, _, _ = sp.block_fft(part)
        sd, _ = nz.parseval_sd(Xp, L, fs)
        many.add(Xp, sd)
        sds.append(sd)
    np.testing.assert_allclose(np.concatenate(sds), sd_all, rtol=1e-12)
    np.testing.assert_allclose(many.psd()[0], one.psd()[0], rtol=1e-10)


@pytest.mark.parametrize("seed", range(4))
def test_median_equals_numpy_median(seed):
    # reference: numpy.median itself, value and dtype, over odd and even lengths, NaN, integers,
    # float32 and one axis of a 2-D array
    from qcd.measures.noise import median
    rng = np.random.default_rng(seed)
    cases = [rng.normal(size=n) for n in (1, 2, 3, 10, 11, 1000, 1001)]
    cases += [rng.integers(-5, 5, size=n) for n in (4, 7)]
    cases += [rng.normal(size=9).astype(np.float32), [3.0, 1.0, 2.0, 8.0]]
    with_nan = rng.normal(size=12)
    with_nan[5] = np.nan
    cases.append(with_nan)
    for x in cases:
        got, want = median(x), np.median(x)
        np.testing.assert_array_equal(got, want)
        assert np.asarray(got).dtype == np.asarray(want).dtype
    rows = rng.normal(size=(6, 8))
    rows[2, 3] = np.nan
    for m in (rows, rows[:, :7], rows.T):
        np.testing.assert_array_equal(median(m, axis=1), np.median(m, axis=1))
        np.testing.assert_array_equal(median(m), np.median(m))
