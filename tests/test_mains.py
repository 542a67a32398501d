"""Mains hum (qcd.measures.mains) against analytic sinusoids (RMS A/sqrt(2)), METHODS.md §4,
Bessel-filtered noise from scipy.signal.bessel (tests/references.py), the scatter of repeated
noise draws, and a real gap-free recording. Values in pA are plain numbers here."""
from __future__ import annotations

import math

import numpy as np
import pytest

from qcd.measures import humfit, mains, zoom
from qcd.measures import spectrum as sp
from references import analog_bessel_noise, sine


def _spectrum(x: np.ndarray, fs: float, L: int, *, coherent: bool = True):
    """(freqs, Welch PSD, segments, LineBins) of x in contiguous L-sample blocks."""
    nb = len(x) // L
    X, _, _ = sp.block_fft(x[:nb * L].reshape(nb, L))
    acc = sp.WelchAccumulator(L, fs)
    acc.add(X, np.ones(nb))
    lines = None
    if coherent:
        lines = zoom.LineBins(L, fs)
        lines.add(X, np.arange(nb) * L, 0)
    P, k = acc.psd()
    return np.arange(L // 2 + 1) * fs / L, P, k, lines


def _methods_42_signal(f1: float = 50.0, seed: int = 0, fs: float = 10_000.0, dur: float = 60.0):
    """METHODS §4.2 worked example: 1.0 pA at f1 + 0.3 pA at 3 f1 + white sigma 0.5 pA."""
    rng = np.random.default_rng(seed)
    n = int(fs * dur)
    return (sine(n, fs, 1.0, f1) + sine(n, fs, 0.3, 3 * f1, 0.7)
            + rng.normal(0.0, 0.5, n)), fs


# --- the PSD method -----------------------------------------------------------------------------

def test_hum_worked_example_methods_4_2():
    # METHODS §4.2 table: P1 = 0.500 pA^2 (A = 1.000 pA), P3 = 0.045 pA^2 (A = 0.301 pA)
    x, fs = _methods_42_signal()
    f, P, k, lines = _spectrum(x, fs, 10_000)
    h = mains.hum(f, P, k_segments=k, lines=lines)
    assert h.found and h.detected and h.nominal_hz == 50.0
    p = {row[0]: row[2] for row in h.harmonics}
    se = {row[0]: row[3] for row in h.harmonics}
    assert p[1] == pytest.approx(0.500, rel=0.02)
    assert p[3] == pytest.approx(0.045, rel=0.03)
    assert h.fundamental_power == pytest.approx(0.5, rel=0.02)
    assert h.power == pytest.approx(0.545, rel=0.03)
    assert math.sqrt(2 * p[1]) == pytest.approx(1.000, rel=0.01)
    # harmonics without hum add their noise-corrected power: zero within their own errors,
    # so the 18 empty harmonics up to 1 kHz do not pile up noise into the total
    empty = [h_ for h_ in p if h_ not in (1, 3)]
    assert len(empty) == 18
    assert all(abs(p[h_]) <= 4 * se[h_] for h_ in empty)
    assert abs(sum(p[h_] for h_ in empty)) <= 4 * math.sqrt(sum(se[h_] ** 2 for h_ in empty))
    assert h.significant and h.power_se < 0.01 * h.power


@pytest.mark.parametrize("coherent", [False, True], ids=["psd", "zoom"])
@pytest.mark.parametrize("f0", [50.0, 50.1, 49.9, 50.07, 60.0, 60.1, 59.9, 59.96])
def test_hum_amplitude_within_5_percent_off_nominal(f0, coherent):
    # amplitude of the fundamental A = sqrt(2 P1) within 5 % with the grid up to 0.1 Hz off
    # (METHODS §4.2 signal; §4.1: +-200 mHz normal deviation), line found to 0.05 Hz
    x, fs = _methods_42_signal(f1=f0, seed=int(f0 * 100))
    f, P, k, lines = _spectrum(x, fs, 10_000, coherent=coherent)
    h = mains.hum(f, P, k_segments=k, lines=lines)
    assert h.found and h.line_measured
    assert h.nominal_hz == (50.0 if f0 < 55 else 60.0)
    assert math.sqrt(2 * h.fundamental_power) == pytest.approx(1.0, rel=0.05)
    assert abs(h.line_hz - f0) <= 0.05


def test_hum_given_mains_frequency_is_measured_without_detection():
    x, fs = _methods_42_signal(f1=60.0)
    f, P, k, lines = _spectrum(x, fs, 10_000)
    h = mains.hum(f, P, k_segments=k, mains_hz=60.0, lines=lines)
    assert h.source == "declared" and not h.detected and h.family_db is None
    assert math.sqrt(2 * h.fundamental_power) == pytest.approx(1.0, rel=0.05)


@pytest.mark.parametrize("extra_hz", [None, 37.0, 123.4, 1234.0])
def test_no_mains_line_found_in_noise_and_other_lines_give_only_an_upper_bound(extra_hz):
    # white noise, optionally with a strong line (30 x the floor per bin) that belongs to
    # neither mains family; 123.4 Hz sits 0.6 Hz beyond the +-1.5 % window of 120 Hz, where the
    # phase-coherent zoom has a side lobe one bin from the line
    rng = np.random.default_rng(21)
    fs = 10_000.0
    x = rng.normal(0, 0.5, int(fs * 30))
    if extra_hz:
        x += sine(len(x), fs, 1.0, extra_hz)
    f, P, k, lines = _spectrum(x, fs, 10_000)
    h = mains.hum(f, P, k_segments=k, lines=lines)
    assert not h.found and h.source == "none"
    if extra_hz != 123.4:     # (that line's skirt falls into the +-3 Hz band of 120 Hz)
        # the bound covers zero hum and stays small: white 0.5 pA over 5 kHz is 5e-5 pA^2/Hz
        # (METHODS §3.2 check value); 20 harmonic bands of 7 bins hold 7e-3 pA^2 of it
        assert 0.0 < h.rms_max < 0.05


def test_mains_family_decision_methods_4_3():
    # METHODS §4.3: family ratio >= +10 dB -> 50 Hz, <= -10 dB -> 60 Hz (common practice)
    rng = np.random.default_rng(3)
    fs, n = 10_000.0, 200_000
    base = rng.normal(0, 0.5, n)
    for f1, sign in ((50.0, 1), (60.0, -1)):
        x = base + sine(n, fs, 1.0, f1) + sine(n, fs, 0.3, 2 * f1) + sine(n, fs, 0.2, 3 * f1)
        f, P, k, lines = _spectrum(x, fs, 10_000)
        assert mains.mains_family_db(f, P, k) * sign >= 30.0
        assert mains.hum(f, P, k_segments=k, lines=lines).nominal_hz == f1
    f, P, k, lines = _spectrum(base, fs, 10_000)
    assert not mains.hum(f, P, k_segments=k, lines=lines).found


@pytest.mark.parametrize("seconds", [10, 20])
@pytest.mark.parametrize("f0", [49.91, 50.08, 59.93, 60.12])
def test_line_found_to_0_05_hz_at_a_local_snr_of_5_per_bin(f0, seconds):
    # the fundamental alone, its Hann peak 5x the local noise density per 1 Hz bin:
    # peak density (A^2/2)/(ENBW df), ENBW = 1.5 bins (METHODS §3.4, Harris 1978), over the
    # white density S = 2 sigma^2/fs (Parseval, one-sided). Detection must not lose it, and
    # the phase-coherent zoom pins it well below one bin (0.05 Hz = 1/20 bin).
    fs, L = 10_000.0, 10_000
    sigma = 1.0
    S = 2 * sigma ** 2 / fs
    amp = math.sqrt(2 * 5.0 * 1.5 * (fs / L) * S)
    rng = np.random.default_rng(int(f0 * 100) + seconds)
    n = int(seconds * fs)
    x = rng.normal(0.0, sigma, n) + sine(n, fs, amp, f0, rng.uniform(0, 2 * np.pi))
    f, P, k, lines = _spectrum(x, fs, L)
    h = mains.hum(f, P, k_segments=k, lines=lines)
    assert h.found and h.nominal_hz == (50.0 if f0 < 55 else 60.0)
    assert abs(h.line_hz - f0) <= 0.05


def test_hum_power_error_matches_the_scatter_over_noise_draws():
    # 40 independent 4 s recordings of one hum (1.0 and 0.3 pA at 60/180 Hz) under white noise
    # of 2 pA: the reported standard error must describe the scatter of the values (Monte Carlo
    # reference), and the mean must sit on the analytic power 0.5 + 0.045 pA^2
    fs, L, n = 10_000.0, 10_000, 40_000
    vals, errs = [], []
    for seed in range(40):
        rng = np.random.default_rng(seed)
        x = (rng.normal(0.0, 2.0, n) + sine(n, fs, 1.0, 60.0, rng.uniform(0, 6.3))
             + sine(n, fs, 0.3, 180.0, rng.uniform(0, 6.3)))
        f, P, k, lines = _spectrum(x, fs, L)
        h = mains.hum(f, P, k_segments=k, mains_hz=60.0, lines=lines)
        vals.append(h.power)
        errs.append(h.power_se)
    sd = float(np.std(vals, ddof=1))
    assert 0.7 <= float(np.mean(errs)) / sd <= 1.4
    assert abs(float(np.mean(vals)) - 0.545) <= 3 * sd / math.sqrt(len(vals))


def test_noise_does_not_pile_up_with_the_number_of_harmonics():
    # noise only, mains declared: summing 4 or 20 harmonic bands, each corrected by its local
    # floor and not clipped, averages to zero over draws (the clipped sum would grow with
    # the number of bands)
    fs, L, n = 10_000.0, 10_000, 40_000
    totals = {200.0: [], 1000.0: []}
    for seed in range(30):
        x = np.random.default_rng(100 + seed).normal(0.0, 2.0, n)
        f, P, k, lines = _spectrum(x, fs, L)
        for top in totals:
            totals[top].append(mains.hum(f, P, k_segments=k, mains_hz=50.0, max_hz=top,
                                         lines=lines).power)
    for vals in totals.values():
        assert abs(np.mean(vals)) <= 3 * np.std(vals, ddof=1) / math.sqrt(len(vals))


# --- the least-squares fit in short windows ------------------------------------------------------

def test_hum_fit_in_short_windows_recovers_the_worked_example_amplitudes():
    # METHODS §4.2 worked example amplitudes (1.0 pA at 50 Hz, 0.3 pA at 150 Hz, white 0.5 pA)
    # in 50 ms windows (20 Hz bins: the PSD cannot resolve the line), random phase per window
    # as from sweep to sweep, an offset and a trend as on a holding baseline; the grid 0.05 Hz
    # off nominal (EN 50160 allows +-0.5 Hz). Least squares of a sinusoid of known frequency is
    # unbiased once the noise in its band is removed (common practice).
    fs, n = 20_000.0, 1000
    rng = np.random.default_rng(11)
    t = np.arange(n) / fs
    fit = humfit.HumFit(n, fs, 50.0)
    for _ in range(300):
        ph = rng.uniform(0, 2 * np.pi, 2)
        y = (1.0 * np.sin(2 * np.pi * 50.05 * t + ph[0]) + 0.3 * np.sin(2 * np.pi * 150.15 * t
             + ph[1]) + rng.normal(0.0, 0.5, n) - 40.0 + 3.0 * t)
        fit.add(y[None, :])
    h = fit.result()
    p = {row[0]: row[2] for row in h.harmonics}
    assert math.sqrt(2 * p[1]) == pytest.approx(1.0, rel=0.05)     # A = sqrt(2 P)
    assert math.sqrt(2 * p[3]) == pytest.approx(0.3, rel=0.05)
    assert math.sqrt(h.power) == pytest.approx(math.sqrt(0.5 + 0.045), rel=0.05)
    assert abs(h.power - 0.545) <= 3 * h.power_se


def test_hum_fit_reports_next_to_nothing_without_mains():
    # white noise only: after the noise-bias correction the hum power averages to ~0
    fs, n = 20_000.0, 1000
    rng = np.random.default_rng(12)
    fit = humfit.HumFit(n, fs, 60.0)
    fit.add(rng.normal(0.0, 0.5, (300, n)))
    h = fit.result()
    assert abs(h.power) <= 3 * h.power_se
    assert h.rms_max < 0.05 * 0.5
    assert not h.significant


@pytest.mark.parametrize("ms", [50, 100, 200])
@pytest.mark.parametrize("fc_div", [10, 5])
def test_hum_fit_is_not_biased_by_filtered_noise(ms, fc_div):
    # Bessel-filtered noise (scipy.signal.bessel, 4 poles, corner fs/10 or fs/5): its density
    # near the harmonics is 2.4-4.8x what white noise of the same SD spread to Nyquist would
    # have (equivalent bandwidth 1.0464 fc, METHODS §3.2), which is the bias a white-noise
    # correction leaves. 200 windows; hum 0.35, 0.10, 0.06 pA at 60/120/180 Hz, true power
    # sum A^2/2 (analytic); the noise SD is 4x the hum RMS.
    fs = 20_000.0
    n = int(ms * fs / 1000)
    amps = (0.35, 0.10, 0.06)
    truth = sum(a * a / 2 for a in amps)
    rng = np.random.default_rng(ms + fc_div)
    noise = analog_bessel_noise(rng, 200 * n + 256, fs, fs / fc_div, oversample=4)[256:]
    blocks = (noise / noise.std() * 4 * math.sqrt(truth)).reshape(200, n)
    t = np.arange(n) / fs
    for b in blocks:
        t0 = rng.uniform(0, 100)
        b += sum(a * np.sin(2 * np.pi * h * 60.0 * (t + t0) + rng.uniform(0, 6.3))
                 for h, a in enumerate(amps, start=1))
    fit = humfit.HumFit(n, fs, 60.0)
    fit.add(blocks)
    h = fit.result()
    assert abs(h.power - truth) <= 3 * h.power_se
    assert h.power == pytest.approx(truth, rel=0.12)


def test_hum_fit_error_matches_the_scatter_over_noise_draws():
    # 30 draws of 20 windows of 100 ms with hum under Bessel-filtered noise (fs/10): the
    # reported standard error describes the scatter of the values (Monte Carlo reference)
    fs, n = 20_000.0, 2000
    amps = (0.35, 0.10, 0.06)
    truth = sum(a * a / 2 for a in amps)
    t = np.arange(n) / fs
    vals, errs = [], []
    for seed in range(30):
        rng = np.random.default_rng(500 + seed)
        noise = analog_bessel_noise(rng, 20 * n + 256, fs, fs / 10, oversample=4)[256:]
        blocks = (noise / noise.std() * 1.0).reshape(20, n)
        for b in blocks:
            t0 = rng.uniform(0, 100)
            b += sum(a * np.sin(2 * np.pi * h * 60.0 * (t + t0)) for h, a in enumerate(amps, 1))
        fit = humfit.HumFit(n, fs, 60.0)
        fit.add(blocks)
        h = fit.result()
        vals.append(h.power)
        errs.append(h.power_se)
    sd = float(np.std(vals, ddof=1))
    assert 0.7 <= float(np.mean(errs)) / sd <= 1.4
    assert abs(float(np.mean(vals)) - truth) <= 3 * sd / math.sqrt(len(vals))


@pytest.mark.parametrize("ms", [50, 100, 200])
def test_hum_fit_agrees_with_the_psd_on_a_real_gap_free_file(ms):
    # gapfree_cc_slow_drift.abf (MANIFEST: slow drift and 60 Hz): the PSD method (tested above
    # against METHODS §4.2) and the short-window fit are independent estimates of one line.
    # Its floor falls steeply below the fundamental (drift), which a white-noise correction
    # read as hum: +16 % at 50 ms and +9 % at 100 ms before the local correction.
    from qcd.analyze import analyze_path
    from qcd.recording import open_recording
    from conftest import abf
    path = abf("gapfree_cc_slow_drift.abf")
    ref = analyze_path(path, digest=False).channels[0].measures
    with open_recording(path) as rec:
        x = np.concatenate(list(rec.chunks(0)))
        fs = rec.fs
    n = int(ms / 1000 * fs)
    fit = humfit.HumFit(n, fs, ref["line_hz"].value)
    fit.add(x[: len(x) // n * n].reshape(-1, n))
    h = fit.result()
    assert math.sqrt(max(h.fundamental_power, 0.0)) == pytest.approx(
        ref["hum_fundamental_rms"].value, rel=0.06)
    assert h.rms == pytest.approx(ref["hum_rms"].value, rel=0.06)


def test_hum_fit_needs_two_and_a_half_mains_cycles():
    # the probe half a cycle below the fundamental must stay apart from the baseline polynomial
    assert not humfit.HumFit.fits(int(0.035 * 20_000), 20_000.0, 60.0)     # 2.1 cycles
    assert humfit.HumFit.fits(int(0.050 * 20_000), 20_000.0, 50.0)         # 2.5 cycles


def test_incomplete_gamma_tail_matches_scipy():
    # reference library: scipy.special.gammaincc (regularised upper incomplete gamma)
    from scipy.special import gammaincc
    for a in (1.0, 1.86, 3.7, 9.3, 37.3, 372.0, 4000.0, 9000.0):
        x = a * np.linspace(0.05, 4.0, 200)
        ref = gammaincc(a, x)
        got = mains.gamma_q(a, x)
        tol = 1e-9 if a <= 5000 else 2e-2       # beyond 5000: Wilson-Hilferty normal
        ok = ref > 1e-12
        assert np.all(np.abs(got[ok] - ref[ok]) <= tol * ref[ok] + 1e-15), a


def test_gauss_hermite_rule_is_numpys_and_integrates_the_normal_moments():
    # the written-out rule against numpy.polynomial.hermite_e.hermegauss (the reference
    # library), and against the normal moments E[Z^2k] = (2k-1)!! that a 24-point rule
    # integrates exactly up to degree 47 (Gauss quadrature; analytic)
    z, w = mains._hermite()
    ref_z, ref_w = np.polynomial.hermite_e.hermegauss(24)
    np.testing.assert_allclose(z, ref_z, rtol=1e-13, atol=0)
    np.testing.assert_allclose(w, ref_w / ref_w.sum(), rtol=1e-13, atol=0)
    for k in range(0, 12):
        want = math.prod(range(2 * k - 1, 0, -2)) if k else 1.0
        assert float(w @ z ** (2 * k)) == pytest.approx(want, rel=1e-12)
        assert abs(float(w @ z ** (2 * k + 1))) < 1e-9 * max(want, 1.0)


@pytest.mark.parametrize("q", [1e-9, 0.001, 0.025, 0.5, 0.8, 0.999, 1 - 1e-12])
def test_normal_quantile_is_the_standard_librarys(q):
    # statistics.NormalDist as the reference; scipy.special.ndtri agrees to 1e-12
    from statistics import NormalDist
    import scipy.special
    assert mains._normal_quantile(q) == NormalDist().inv_cdf(q)
    assert mains._normal_quantile(q) == pytest.approx(float(scipy.special.ndtri(q)),
                                                      rel=1e-12, abs=1e-12)
    with pytest.raises(ValueError):
        mains._normal_quantile(1.0)
