"""Test-pulse measures against the METHODS.md §1 closed forms, simulated filtered cells and real files.

References: tests/references.py (closed form of Ra + (Rm ∥ Cm), METHODS §1.1 [D]; the
two-compartment cell solved by eigen-decomposition and by matrix exponential, METHODS §1.5 [D];
scipy Bessel filter, norm='mag'); METHODS §1.2 simulation table [D]; METHODS §1.3/§1.4/§1.5
check values [D]; real recordings from ../shared/data/abf/ read with pyabf itself (steps, peak
transients, ramp capacitance and hand-computed resistances independently of qcd).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from hypothesis import given, settings, strategies as st

from qcd.measures import testpulse as tp
import references as ref
from conftest import ABF_FILES, abf

pA, mV, MOhm, GOhm, pF, us, fC = 1e-12, 1e-3, 1e6, 1e9, 1e-12, 1e-6, 1e-15

CELL_A = (10 * MOhm, 500 * MOhm, 33 * pF)      # METHODS §1.1 check cell
CELL_B = (25 * MOhm, 250 * MOhm, 20 * pF)      # a second, slower-access cell (τ 454.5 µs)
FILTERS = [(10e3, 50e3), (5e3, 25e3), (2e3, 10e3)]   # 4-pole Bessel fc, fs (METHODS §1.2)
PHASES = (0.1, 0.5, 1.0)                       # first sample δ/dt after onset


def _approx(expected, rel=None, abs=0.0):
    """pytest.approx without its default 1e-12 absolute tolerance, which would swallow SI
    values in pA, pF and fC; rel only, unless abs is given."""
    return pytest.approx(expected, rel=rel, abs=abs)


def _cell_sweep(cell, fc, fs, phase, *, dv=-5 * mV, step_s=10e-3, **kw):
    ra, rm, cm = cell
    n_pre, n_step = int(2e-3 * fs), int(step_s * fs)
    y = ref.sampled_cell(dv, ra, rm, cm, fs, n_pre=n_pre, n_step=n_step, n_post=n_step,
                         filter_hz=fc, phase=phase, **kw)
    return y, tp.StepWindow(n_pre, n_pre + n_step, dv)


def whole_cell(*args, **kw):
    """try_whole_cell's estimates, or None where it rejects the step (its reason unused here)."""
    r = tp.try_whole_cell(*args, **kw)
    return r if isinstance(r, tp.WholeCell) else None


def _errors(w, cell):
    ra, rm, cm = cell
    return (w.access_resistance / ra - 1, w.membrane_resistance / rm - 1,
            w.membrane_capacitance / cm - 1)


# --- METHODS §1.1 closed form ----------------------------------------------------------------

def test_closed_form_matches_methods_check_values():
    # METHODS §1.1 check values [D]: 10 MΩ / 500 MΩ / 33 pF at -5 mV
    c = ref.cell_constants(-5 * mV, *CELL_A)
    assert c["i0"] == _approx(-500.000 * pA, rel=1e-6)
    assert c["i_ss"] == _approx(-9.8039 * pA, rel=1e-4)
    assert c["a"] == _approx(-490.196 * pA, rel=1e-5)
    assert c["tau"] == _approx(323.529 * us, rel=1e-5)
    assert c["q"] == _approx(-158.593 * fC, rel=1e-5)
    assert c["q_closed"] == _approx(c["q"], rel=1e-12)
    assert c["dvm_inf"] == _approx(-4.902 * mV, rel=1e-3)
    t = np.array([0.0, 1e-9, 1.0])
    i = ref.cell_step_current(t, -5 * mV, *CELL_A)
    assert i[0] == 0.0 and i[1] == _approx(-500 * pA, rel=1e-5)
    assert i[2] == _approx(-9.8039 * pA, rel=1e-4)


def test_reference_filter_has_unity_dc_gain_and_methods_group_delay():
    # scipy.signal.bessel(norm='mag'): -3 dB at fc; DC group delay 0.3364/fc (METHODS §1.2 [D])
    fc = 5e3
    z, p, k = signal.bessel(4, 2 * np.pi * fc, analog=True, norm="mag", output="zpk")
    _, h = signal.freqs_zpk(z, p, k, worN=[1e-3, 2 * np.pi * fc])
    assert abs(h[0]) == _approx(1.0, abs=1e-9)
    assert 20 * np.log10(abs(h[1])) == _approx(-3.0103, abs=1e-3)
    dw = 1e-3 * 2 * np.pi * fc
    _, h2 = signal.freqs_zpk(z, p, k, worN=[dw, 2 * dw])
    delay = -(np.angle(h2[1]) - np.angle(h2[0])) / dw
    assert delay * fc == _approx(tp.BESSEL4_DELAY, rel=1e-3)


# --- whole cell behind filters ---------------------------------------------------------------

@pytest.mark.parametrize("cell", [CELL_A, CELL_B], ids=["10M-500M-33p", "25M-250M-20p"])
@pytest.mark.parametrize("fc,fs", FILTERS, ids=["4p10k-50k", "4p5k-25k", "4p2k-10k"])
def test_whole_cell_is_unbiased_behind_bessel_filter(cell, fc, fs):
    # METHODS §1.2: charge method with fitted τ is robust behind unity-DC-gain filters
    for phase in PHASES:
        y, step = _cell_sweep(cell, fc, fs, phase, holding=-50 * pA)
        w = whole_cell(y, fs, step, filter_hz=fc)
        assert w is not None
        e_ra, e_rm, e_cm = _errors(w, cell)
        assert abs(e_ra) < 0.05 and abs(e_rm) < 0.03 and abs(e_cm) < 0.05, (phase, e_ra, e_rm, e_cm)
        ra, rm, cm = cell
        assert w.tau == _approx(cm * ra * rm / (ra + rm), rel=0.01)   # METHODS §1.1 τ
        assert w.holding == _approx(-50 * pA, rel=1e-9)
        assert w.head == "sampled"
        # Q = dV·Cm·(Rm/Rt)² (METHODS §1.1 closed form); filters keep Q
        assert w.charge == _approx(ref.cell_constants(-5 * mV, *cell)["q"], rel=0.015)


@pytest.mark.parametrize("cell", [CELL_A, CELL_B], ids=["10M-500M-33p", "25M-250M-20p"])
def test_whole_cell_unfiltered_avoids_riemann_bias(cell):
    # METHODS §1.2 caution: the plain charge sum is biased on unfiltered data; the analytic
    # integral of the fit from onset is exact up to the unknown sampling phase, at most a factor
    # exp(±dt/(2τ)) on Ra and Cm (3.1% for cell A at 50 kHz).
    fs = 50e3
    for phase in PHASES:
        y, step = _cell_sweep(cell, None, fs, phase)
        w = whole_cell(y, fs, step)
        assert w is not None and w.head == "fitted"
        e_ra, e_rm, e_cm = _errors(w, cell)
        assert abs(e_ra) < 0.05 and abs(e_rm) < 0.03 and abs(e_cm) < 0.05, (phase, e_ra, e_rm, e_cm)


def test_whole_cell_unfiltered_coarse_sampling_stays_within_phase_bound():
    # 10 kHz unfiltered: the phase ambiguity bound exp(dt/(2τ)) - 1 = 16.7% for cell A
    # (METHODS §1.2 sampling phase); the naive Riemann sum would give 8.6-11.6 MΩ.
    fs = 10e3
    tau = ref.cell_constants(-5 * mV, *CELL_A)["tau"]
    bound = math.expm1(0.5 / (fs * tau)) + 0.01
    for phase in PHASES:
        y, step = _cell_sweep(CELL_A, None, fs, phase)
        w = whole_cell(y, fs, step)
        e_ra, e_rm, _ = _errors(w, CELL_A)
        assert abs(e_ra) < bound and abs(e_rm) < 0.01
    y, step = _cell_sweep(CELL_A, None, fs, 0.5)      # mid-interval phase is exact
    e = _errors(whole_cell(y, fs, step), CELL_A)
    assert max(abs(v) for v in e) < 1e-3


@pytest.mark.parametrize("fc,fs,table_peak", [(10e3, 50e3, 11.17), (5e3, 25e3, 12.10),
                                              (2e3, 10e3, 15.23)])
def test_naive_peak_estimate_is_biased_as_in_methods_table(fc, fs, table_peak):
    # METHODS §1.2 table [D]: "Ra peak" column for the §1.1 cell behind 4-pole Bessel
    y, step = _cell_sweep(CELL_A, fc, fs, 1.0)
    peak = tp.peak_access_resistance(y, fs, step)
    assert peak / MOhm == _approx(table_peak, rel=0.03)
    w = whole_cell(y, fs, step, filter_hz=fc)
    assert abs(w.access_resistance / CELL_A[0] - 1) < 0.02
    if fc <= 5e3:
        assert peak / CELL_A[0] - 1 > 0.10      # a regression to the naive method would fail


def test_pipette_capacitance_fast_component_is_excluded():
    # METHODS §1.2 caution: uncompensated Cp adds a fast component and extra charge Cp·dV
    # (4 pF · 5 mV = 20 fC, 12.6% of Q); the fit starts after it and the charge excludes it.
    for fc, fs in [(10e3, 50e3), (None, 50e3)]:
        for phase in PHASES:
            y, step = _cell_sweep(CELL_A, fc, fs, phase, cp=4 * pF, tau_cp=15 * us)
            w = whole_cell(y, fs, step, filter_hz=fc)
            assert w is not None and w.head == "fitted"
            e_ra, e_rm, e_cm = _errors(w, CELL_A)
            assert abs(e_ra) < 0.05 and abs(e_rm) < 0.03 and abs(e_cm) < 0.05, (fc, phase)


def test_whole_cell_with_noise_stays_within_tolerance():
    # white noise 1 pA RMS (a quiet whole-cell baseline, common practice), 25 ms steps
    rng = np.random.default_rng(7)
    errs = []
    for k in range(6):
        y, step = _cell_sweep(CELL_A, 5e3, 25e3, rng.uniform(0.05, 1.0), step_s=25e-3,
                              noise_sd=1 * pA, rng=rng)
        errs.append(_errors(whole_cell(y, 25e3, step, filter_hz=5e3), CELL_A))
    e = np.abs(np.array(errs))
    assert e[:, 0].max() < 0.05 and e[:, 1].max() < 0.03 and e[:, 2].max() < 0.05, e


def test_whole_cell_rejects_short_clipped_and_flat_sweeps():
    y, step = _cell_sweep(CELL_A, 5e3, 25e3, 0.5)
    short = tp.StepWindow(step.start, step.start + 10, step.amplitude)
    r = tp.try_whole_cell(y, 25e3, short, filter_hz=5e3)
    assert isinstance(r, tp.Rejected) and r.code == "too_short"
    assert whole_cell(y, 25e3, short) is None
    # converter rails at -300 pA clip the -400 pA filtered peak (flat top)
    clipped = np.clip(y, -300 * pA, None)
    r = tp.try_whole_cell(clipped, 25e3, step, filter_hz=5e3)
    assert isinstance(r, tp.Rejected) and r.code == "clipped"
    r = tp.try_whole_cell(y, 25e3, step, filter_hz=5e3, rails=(-300 * pA, 300 * pA))
    assert isinstance(r, tp.Rejected) and r.code == "clipped"
    # a step lasting under 3τ leaves I_ss undetermined
    # 25 samples = 1 ms; after the fit start (≥ 3·t_d) less than 3 τ (0.97 ms) remains
    brief = tp.StepWindow(step.start, step.start + 25, step.amplitude)
    r = tp.try_whole_cell(y, 25e3, brief, filter_hz=5e3)
    assert isinstance(r, tp.Rejected) and r.code == "too_short"
    no_pre = tp.StepWindow(1, 200, step.amplitude)
    assert tp.try_whole_cell(y[step.start - 1:], 25e3, no_pre).code == "too_short"
    bad = y.copy()
    bad[step.start + 30] = np.nan
    assert tp.try_whole_cell(bad, 25e3, step).code == "not_finite"


# --- seal and open pipette (METHODS §1.3) ----------------------------------------------------

def _resistor(r, dv, *, noise_sd=0.0, rng=None, cp=0.0, fs=20e3):
    n_pre, n_step = 200, 2000
    y = ref.sampled_resistor(dv, r, fs, n_pre=n_pre, n_step=n_step, n_post=n_step,
                             filter_hz=5e3, noise_sd=noise_sd, rng=rng, cp=cp, holding=3 * pA)
    return y, tp.StepWindow(n_pre, n_pre + n_step, dv)


def test_seal_one_gigaohm_at_plus_10_mv():
    # METHODS §1.3 [D]: +10 mV on 1 GΩ gives 10.0 pA
    y, step = _resistor(1 * GOhm, 10 * mV, cp=3 * pF)
    assert np.mean(y[step.stop - 800:step.stop]) - 3 * pA == _approx(10.0 * pA, rel=1e-6)
    assert tp.seal_resistance(y, 20e3, step) == _approx(1 * GOhm, rel=0.05)
    assert whole_cell(y, 20e3, step, filter_hz=5e3) is None
    assert tp.try_whole_cell(y, 20e3, step, filter_hz=5e3).code == "no_transient"
    assert tp.classify(y, 20e3, step, filter_hz=5e3) == "seal"


def test_ten_gigaohm_seal_resolved_by_averaging_noisy_pulses():
    # METHODS §1.3 [D]: -5 mV on 10 GΩ gives -0.50 pA; at ≥10 GΩ average pulses [P].
    # 1 pA RMS white noise per sample, 40 pulses.
    rng = np.random.default_rng(3)
    sweeps = []
    for _ in range(40):
        y, step = _resistor(10 * GOhm, -5 * mV, noise_sd=1 * pA, rng=rng)
        sweeps.append(y)
    avg = tp.average_steps(sweeps, step)
    assert np.std(avg[:step.start]) < np.std(sweeps[0][:step.start]) / 4   # √40 ≈ 6.3
    assert tp.seal_resistance(avg, 20e3, step) == _approx(10 * GOhm, rel=0.05)
    assert tp.classify(avg, 20e3, step, filter_hz=5e3) == "seal"
    # the standard error shrinks about √40-fold with averaging and covers the true value
    se1 = tp.seal_resistance_se(sweeps[0], 20e3, step)
    se40 = tp.seal_resistance_se(avg, 20e3, step)
    assert 3.0 < se1 / se40 < 15.0
    assert abs(tp.seal_resistance(avg, 20e3, step) - 10 * GOhm) < 4 * se40


def test_open_pipette_in_bath():
    # METHODS §1.3 [D]: a 5 MΩ pipette in the bath gives 1000 pA at 5 mV
    y, step = _resistor(5 * MOhm, 5 * mV, cp=3 * pF)
    assert np.mean(y[step.stop - 800:step.stop]) - 3 * pA == _approx(1000 * pA, rel=1e-6)
    assert tp.seal_resistance(y, 20e3, step) == _approx(5 * MOhm, rel=0.05)
    assert tp.classify(y, 20e3, step, filter_hz=5e3) == "open_pipette"


def test_classify_whole_cell_and_no_response():
    y, step = _cell_sweep(CELL_A, 5e3, 25e3, 0.5)
    assert tp.classify(y, 25e3, step, filter_hz=5e3) == "whole_cell"
    rng = np.random.default_rng(5)
    flat = rng.normal(0, 1 * pA, 3000)      # open circuit: noise only, no response
    assert tp.classify(flat, 20e3, tp.StepWindow(200, 2200, -5 * mV)) == "none"
    assert tp.classify(y, 25e3, tp.StepWindow(step.start, step.start + 5, -5 * mV)) == "none"
    assert tp.classify(np.clip(y, -300 * pA, None), 25e3, step, filter_hz=5e3) == "none"
    assert math.isnan(tp.seal_resistance(-y, 25e3, step))      # response against the step
    assert math.isnan(tp.seal_resistance_se(-y, 25e3, step))


# --- current clamp (METHODS §1.4) -------------------------------------------------------------

@pytest.mark.parametrize("step_s", [0.2, 0.05], ids=["settled", "short-fit-asymptote"])
def test_input_resistance_excludes_bridge_jump(step_s):
    # METHODS §1.4 [D]: -50 pA -> -10 mV gives 200 MΩ; τm 20 ms -> 100 pF;
    # 20 MΩ unbalanced bridge at -50 pA -> a -1.0 mV jump
    fs = 20e3
    n_pre, n_step = 400, int(step_s * fs)
    step = tp.StepWindow(n_pre, n_pre + n_step, -50 * pA)
    for rb in (0.0, 20 * MOhm):
        v = ref.sampled_current_clamp(-50 * pA, 200 * MOhm, 20e-3, fs, n_pre=n_pre,
                                      n_step=n_step, n_post=2000, r_bridge=rb, filter_hz=5e3,
                                      noise_sd=0.05 * mV, rng=np.random.default_rng(2))
        c = tp.input_resistance(v, fs, step, filter_hz=5e3)
        assert c.input_resistance == _approx(200 * MOhm, rel=0.03)
        assert c.tau_m == _approx(20e-3, rel=0.03)
        assert c.membrane_capacitance == _approx(100 * pF, rel=0.05)
        assert c.bridge_jump == _approx(-50 * pA * rb, abs=0.1 * mV)
        assert c.baseline == _approx(-65 * mV, abs=0.05 * mV)
    # with the 20 MΩ bridge, the naive dV/dI would read 220 MΩ (10% high)
    assert c.delta_v_ss / (-50 * pA) == _approx(220 * MOhm, rel=0.03)


def test_input_resistance_none_for_wrong_sign_or_short_step():
    v = ref.sampled_current_clamp(50 * pA, 200 * MOhm, 20e-3, 20e3, n_pre=400, n_step=2000)
    assert tp.input_resistance(v, 20e3, tp.StepWindow(400, 2400, -50 * pA)) is None
    assert tp.input_resistance(v, 20e3, tp.StepWindow(400, 410, 50 * pA)) is None


def test_input_resistance_without_fittable_charging_keeps_plain_ratio():
    # τm far below one sample: no charging curve to fit, Rin = ΔV_ss/ΔI (METHODS §1.4)
    fs = 10e3
    v = ref.sampled_current_clamp(-50 * pA, 200 * MOhm, 1e-6, fs, n_pre=200, n_step=2000)
    c = tp.input_resistance(v, fs, tp.StepWindow(200, 2200, -50 * pA))
    assert c.tau_m is None and c.membrane_capacitance is None and c.bridge_jump is None
    assert c.input_resistance == _approx(200 * MOhm, rel=1e-6)


# --- find_step -------------------------------------------------------------------------------

def test_find_step_clean_and_noisy_commands():
    fs = 20e3
    clean = ref.command_trace(-80 * mV, -70 * mV, fs, n_pre=156, n_step=4000, n_post=5844)
    assert tp.find_step(clean, fs) == tp.StepWindow(156, 4156, _approx(-10 * mV, rel=1e-9))
    noisy = ref.command_trace(-75 * mV, -70 * mV, fs, n_pre=300, n_step=1000, n_post=1000,
                              noise_sd=0.2 * mV, filter_hz=5e3, rng=np.random.default_rng(1))
    s = tp.find_step(noisy, fs)
    assert s is not None and abs(s.start - 300) <= 2 and abs(s.stop - 1300) <= 2
    assert s.amplitude == _approx(-5 * mV, rel=0.02)
    cc = ref.command_trace(-50 * pA, 0.0, fs, n_pre=100, n_step=400, n_post=400)
    assert tp.find_step(cc, fs).amplitude == _approx(-50 * pA, rel=1e-9)


def test_find_step_rejects_ramps_noise_short_and_unreturned_steps():
    fs = 20e3
    ramp = np.concatenate([np.full(200, -70 * mV), np.linspace(-70, -90, 2000) * mV,
                           np.full(500, -70 * mV)])
    assert tp.find_step(ramp, fs) is None
    noise = np.random.default_rng(0).normal(-70 * mV, 0.2 * mV, 5000)
    assert tp.find_step(noise, fs) is None
    assert tp.find_step(np.full(1000, -70 * mV), fs) is None
    blip = ref.command_trace(-80 * mV, -70 * mV, fs, n_pre=100, n_step=5, n_post=500)
    assert tp.find_step(blip, fs) is None                       # 0.25 ms < 1 ms minimum
    hold_change = np.concatenate([np.full(300, -70 * mV), np.full(3000, -60 * mV)])
    assert tp.find_step(hold_change, fs) is None                # never returns: not a pulse
    # a ramp first, then a clean step: the step is found
    both = np.concatenate([ramp, ref.command_trace(-80 * mV, -70 * mV, fs, n_pre=100,
                                                    n_step=400, n_post=200)])
    s = tp.find_step(both, fs)
    assert s is not None and s.start == len(ramp) + 100 and s.stop == len(ramp) + 500


# --- averaging and across sweeps --------------------------------------------------------------

def test_average_with_off_transients_matches_on_only_and_halves_noise_variance():
    # METHODS §1.2: average on- and sign-inverted off-transients when half-pulses ≥ 5-10 τ
    fs, fc = 25e3, 5e3
    rng = np.random.default_rng(11)
    sweeps = [_cell_sweep(CELL_A, fc, fs, 0.5, noise_sd=2 * pA, rng=rng)[0] for _ in range(8)]
    _, step = _cell_sweep(CELL_A, fc, fs, 0.5)
    tau = ref.cell_constants(-5 * mV, *CELL_A)["tau"]
    on = tp.average_steps(sweeps, step)
    both = tp.average_steps(sweeps, step, off=True, fs=fs, tau=tau)
    w = whole_cell(both, fs, step, filter_hz=fc)
    e = _errors(w, CELL_A)
    assert abs(e[0]) < 0.05 and abs(e[1]) < 0.03 and abs(e[2]) < 0.05
    clean, _ = _cell_sweep(CELL_A, fc, fs, 0.5)
    seg = slice(step.start + 50, step.stop - 50)
    assert np.var(both[seg] - clean[seg]) < 0.7 * np.var(on[seg] - clean[seg])
    # half-pulses too short for the given τ: on-transients only
    long_tau = (step.stop - step.start) / fs / 4.0     # half-pulse = 4 τ < 5 τ
    same = tp.average_steps(sweeps, step, off=True, fs=fs, tau=long_tau)
    assert np.array_equal(same, on)
    with pytest.raises(ValueError):
        tp.average_steps([np.zeros(10), np.zeros(11)], step)


def test_access_change_pct():
    # first 3 vs last 3 sweeps (common practice; METHODS §2: reject above 20-25%)
    ra = [10e6, 10.5e6, 9.5e6, 11e6, 12e6, 12.5e6, 12e6, np.nan]
    assert tp.access_change_pct(ra[:3], ra[-4:]) == _approx(20.0, rel=1e-12)   # 10 -> 12 MΩ
    with pytest.raises(ValueError):
        tp.access_change_pct([np.nan], [1.0])


# --- invariances (hypothesis) -----------------------------------------------------------------

_BASE, _BASE_STEP = _cell_sweep(CELL_B, 5e3, 25e3, 0.37)


@settings(max_examples=40, deadline=None)
@given(sign=st.sampled_from([1.0, -1.0]), offset=st.floats(-2e-9, 2e-9))
def test_whole_cell_invariant_to_step_sign_and_holding_offset(sign, offset):
    ref_w = whole_cell(_BASE, 25e3, _BASE_STEP, filter_hz=5e3)
    y = sign * _BASE + offset
    step = tp.StepWindow(_BASE_STEP.start, _BASE_STEP.stop, sign * _BASE_STEP.amplitude)
    w = whole_cell(y, 25e3, step, filter_hz=5e3)
    assert w is not None
    for name in ("access_resistance", "membrane_resistance", "membrane_capacitance", "tau"):
        assert getattr(w, name) == _approx(getattr(ref_w, name), rel=1e-6)
    assert w.holding == _approx(offset, abs=1e-15)
    assert w.charge == _approx(sign * ref_w.charge, rel=1e-6)


# --- real recordings --------------------------------------------------------------------------

def _read(name):
    pyabf = pytest.importorskip("pyabf")
    a = pyabf.ABF(str(abf(name)))
    # the amplifier's low-pass as telegraphed into the header (the filter the current went
    # through); the signal conditioner's setting only where no telegraph was recorded
    tel = float(a._adcSection.fTelegraphFilter[0])
    fc = tel if tel > 0 else float(a._adcSection.fSignalLowpassFilter[0])
    sweeps, steps = [], []
    for k in range(a.sweepCount):
        a.setSweep(k)
        sweeps.append(np.asarray(a.sweepY, dtype=float) * pA)      # pA -> A
        # the command waveform pyabf builds from the protocol's epoch table, mV -> V
        steps.append(tp.find_step(np.asarray(a.sweepC, dtype=float) * mV, a.dataRate))
    # the epoch table itself: the test step is epoch B (index 1), first sample at p1s[1]
    return a, fc, sweeps, steps


def test_model_cell_recording_gives_plausible_consistent_values():
    a, fc, sweeps, steps = _read("vc_model_cell_step.abf")
    ep = a.sweepEpochs
    assert steps[0] == tp.StepWindow(ep.p1s[1], ep.p2s[1],
                                     _approx((ep.levels[1] - ep.levels[0]) * mV, rel=1e-6))
    res = [whole_cell(y, a.dataRate, s, filter_hz=fc) for y, s in zip(sweeps, steps)]
    assert all(r is not None for r in res)
    ra = np.array([r.access_resistance for r in res])
    rm = np.array([r.membrane_resistance for r in res])
    cm = np.array([r.membrane_capacitance for r in res])
    # typical model-cell values 10 MΩ + 500 MΩ ∥ 33 pF (METHODS §2, tag M: from memory);
    # broad plausibility ranges only
    assert 5 * MOhm < np.median(ra) < 20 * MOhm
    assert 350 * MOhm < np.median(rm) < 700 * MOhm
    assert 20 * pF < np.median(cm) < 50 * pF
    # a model circuit does not change sweep to sweep
    for v in (ra, rm, cm):
        assert np.std(v) / np.median(v) < 0.03
    assert tp.access_change_pct(ra[:3], ra[-3:]) == _approx(0.0, abs=5.0)
    assert all(tp.classify(y, a.dataRate, s, filter_hz=fc) == "whole_cell"
               for y, s in zip(sweeps[:3], steps[:3]))


def test_cell_recording_runs_and_reports_whole_cell():
    a, fc, sweeps, steps = _read("vc_cell_step.abf")
    res = [whole_cell(y, a.dataRate, s, filter_hz=fc) for y, s in zip(sweeps, steps)]
    assert sum(r is not None for r in res) >= len(res) // 2
    ok = [r for r in res if r is not None]
    assert all(r.access_resistance > 0 and r.membrane_capacitance > 0 for r in ok)
    assert all(math.isfinite(r.tau) for r in ok)


def test_high_resistance_recording_is_a_small_whole_cell_as_its_ramp_shows():
    # vc_tight_seal_noisy.abf: a 10 mV step with a ~2 GOhm steady state, then a ramp -70 ->
    # -80 -> -70 mV. The ramp tells seal from cell independently of any transient fit: a
    # capacitor carries I = C·dV/dt (circuit law), so where the ramp reverses the current
    # jumps by 2·C·|dV/dt|, and the current's slope along the ramp is (dV/dt)/R. Computed here
    # from pyabf's data and epoch table: ~22 pF and ~1.9 GOhm, a small cell with a high
    # membrane resistance (a seal's pipette capacitance is a few pF and is charged at once,
    # not through ~12 MOhm).
    a, fc, sweeps, steps = _read("vc_tight_seal_noisy.abf")
    avg = np.mean(sweeps, axis=0)
    ep, fs = a.sweepEpochs, a.dataRate
    down0, down1, up1 = ep.p1s[3], ep.p2s[3], ep.p2s[4]
    slope = (ep.levels[3] - ep.levels[2]) * mV / ((down1 - down0) / fs)      # V/s
    t_down = np.arange(down0 + 100, down1) / fs
    b_down = np.polyfit(t_down, avg[down0 + 100:down1], 1)
    t_up = np.arange(down1 + 100, up1) / fs
    b_up = np.polyfit(t_up, avg[down1 + 100:up1], 1)
    t_rev = down1 / fs
    c_ramp = (np.polyval(b_up, t_rev) - np.polyval(b_down, t_rev)) / (2 * abs(slope))
    r_ramp = slope / b_down[0]
    assert 15 * pF < c_ramp < 35 * pF and 1 * GOhm < r_ramp < 4 * GOhm
    # qcd's step estimate on the average of the sweeps agrees with the ramp
    w = whole_cell(tp.average_steps(sweeps, steps[0]), fs, steps[0], filter_hz=fc)
    assert w is not None
    assert w.membrane_capacitance == _approx(c_ramp, rel=0.25)
    assert w.total_resistance == _approx(r_ramp, rel=0.15)
    assert w.access_resistance <= w.peak_bound
    kinds = [tp.classify(y, fs, s, filter_hz=fc) for y, s in zip(sweeps, steps)]
    assert kinds.count("whole_cell") > len(kinds) // 2


def test_find_step_on_recorded_command_channel_matches_epoch_table():
    # the file's second channel records the command (mV); the epoch table (pyabf) puts the
    # +20 mV step at samples 750-950; the recorded trace may lag by a sample
    pyabf = pytest.importorskip("pyabf")
    a = pyabf.ABF(str(abf("vc_recorded_command_3ch.abf")))
    ep = a.sweepEpochs
    for k in (0, a.sweepCount - 1):
        a.setSweep(k, channel=1)
        s = tp.find_step(np.asarray(a.sweepY, dtype=float) * mV, a.dataRate)
        assert s is not None
        assert abs(s.start - ep.p1s[2]) <= 1 and abs(s.stop - ep.p2s[2]) <= 1
        assert s.amplitude == _approx((ep.levels[2] - ep.levels[1]) * mV, rel=0.02)


# --- two-compartment cells behind the amplifier filter (METHODS §1.5) -------------------------

# METHODS §1.5 check cell: Ra 10 MΩ; soma 12 pF ∥ 600 MΩ; coupling 40 MΩ; dendrite 30 pF ∥ 400 MΩ
CELL_2C = (10 * MOhm, 12 * pF, 600 * MOhm, 40 * MOhm, 30 * pF, 400 * MOhm)


def test_two_compartment_reference_matches_methods_check_values():
    # METHODS §1.5 check values [D] at dV = -5 mV; the eigen-decomposition and the matrix
    # exponential (scipy.linalg.expm) of the circuit's ODE are two independent solutions
    dv = -5 * mV
    c = ref.two_compartment_constants(dv, *CELL_2C)
    assert c["taus"][0] == _approx(93.2 * us, abs=0.05 * us)
    assert c["taus"][1] == _approx(1351.7 * us, abs=0.05 * us)
    assert c["amps"][0] == _approx(-381.4 * pA, abs=0.05 * pA)
    assert c["amps"][1] == _approx(-99.7 * pA, abs=0.05 * pA)
    assert c["i_ss"] == _approx(-18.95 * pA, abs=0.005 * pA)
    assert dv / (c["i_ss"] + c["amps"].sum()) == _approx(10.00 * MOhm, abs=0.005 * MOhm)
    assert dv / (c["i_ss"] + c["amps"][0]) == _approx(12.49 * MOhm, abs=0.005 * MOhm)
    assert c["q"] / dv == _approx(34.06 * pF, abs=0.005 * pF)
    t = np.arange(1, 600) * 5 * us
    by_eig = c["i_ss"] + sum(a * np.exp(-t / tau) for a, tau in zip(c["amps"], c["taus"]))
    by_expm = ref.two_compartment_current(t, dv, *CELL_2C)
    assert np.max(np.abs(by_expm - by_eig)) < 1e-6 * 500 * pA


# (Ra, Cs, Rs, Rc, Cd, Rd), 4-pole Bessel corner, sample rate. Together they span Ra 5-30 MΩ,
# soma 8-25 pF, dendrite 10-80 pF and coupling 20-100 MΩ behind 2, 5 and 10 kHz filters at
# 20-100 kHz; each fast time constant is above the filter's 1/(2π·fc), where the samples
# determine it (`tp.resolvable_tau`; the case below it is the next test).
TWO_COMPARTMENT_CELLS = [
    pytest.param(CELL_2C, 2e3, 20e3, id="Ra10-Cs12-Rc40-Cd30-2k-20k"),
    pytest.param((5 * MOhm, 8 * pF, 800 * MOhm, 20 * MOhm, 40 * pF, 500 * MOhm), 10e3, 100e3,
                 id="Ra5-Cs8-Rc20-Cd40-10k-100k"),
    pytest.param((30 * MOhm, 25 * pF, 300 * MOhm, 100 * MOhm, 80 * pF, 300 * MOhm), 2e3, 20e3,
                 id="Ra30-Cs25-Rc100-Cd80-2k-20k"),
    pytest.param((15 * MOhm, 15 * pF, 500 * MOhm, 60 * MOhm, 10 * pF, 1000 * MOhm), 5e3, 50e3,
                 id="Ra15-Cs15-Rc60-Cd10-5k-50k"),
    pytest.param((20 * MOhm, 10 * pF, 1000 * MOhm, 20 * MOhm, 60 * pF, 600 * MOhm), 5e3, 25e3,
                 id="Ra20-Cs10-Rc20-Cd60-5k-25k"),
    pytest.param((8 * MOhm, 25 * pF, 400 * MOhm, 100 * MOhm, 15 * pF, 800 * MOhm), 10e3, 50e3,
                 id="Ra8-Cs25-Rc100-Cd15-10k-50k"),
    pytest.param((25 * MOhm, 8 * pF, 700 * MOhm, 50 * MOhm, 80 * pF, 300 * MOhm), 2e3, 40e3,
                 id="Ra25-Cs8-Rc50-Cd80-2k-40k"),
]


def _two_compartment_sweep(cell, fc, fs, phase, *, dv=-5 * mV, noise_sd=1 * pA, rng=None,
                           step_s=40e-3, n_post=None):
    n_pre, n_step = int(5e-3 * fs), int(step_s * fs)
    y = ref.sampled_two_compartment(dv, cell, fs, n_pre=n_pre, n_step=n_step,
                                    n_post=n_step // 2 if n_post is None else n_post,
                                    filter_hz=fc, phase=phase, noise_sd=noise_sd,
                                    holding=-30 * pA, rng=rng)
    return y, tp.StepWindow(n_pre, n_pre + n_step, dv)


@pytest.mark.parametrize("cell,fc,fs", TWO_COMPARTMENT_CELLS)
def test_two_compartment_cells_behind_bessel_filter(cell, fc, fs):
    # exact response (tests/references.py, METHODS §1.5) -> scipy.signal.bessel 4-pole ->
    # sampled at three phases -> 1 pA white noise. Access within 20 % of the true series
    # resistance, total resistance within 5 %, capacitance between the soma's and the whole
    # cell's; access never above dV / peak transient computed here from the samples.
    ra, cs, _, _, cd, _ = cell
    dv = -5 * mV
    c = ref.two_compartment_constants(dv, *cell)
    assert c["taus"][0] > tp.resolvable_tau(fs, fc)
    rng = np.random.default_rng(int(ra / MOhm) * 1000 + int(cs / pF))
    for phase in (0.2, 0.6, 1.0):
        y, step = _two_compartment_sweep(cell, fc, fs, phase, rng=rng)
        w = tp.try_whole_cell(y, fs, step, filter_hz=fc)
        assert isinstance(w, tp.WholeCell), w
        assert w.access_resistance == _approx(ra, rel=0.20), phase
        assert w.total_resistance == _approx(dv / c["i_ss"], rel=0.05), phase
        assert cs < w.membrane_capacitance < cs + cd, phase
        peak = np.max((y[step.start:step.stop] - np.mean(y[:step.start])) * np.sign(dv))
        assert w.access_resistance <= abs(dv) / peak


def test_methods_two_compartment_cell_access_from_all_components():
    # METHODS §1.5 [D]: Ra = dV/(I_ss + A1 + A2) = 10.00 MΩ exactly; the fast component alone
    # gives 12.49 MΩ; Q/dV = 34.06 pF. Noiseless, 10 kHz filter at 100 kHz.
    fs, fc = 100e3, 10e3
    c = ref.two_compartment_constants(-5 * mV, *CELL_2C)
    y, step = _two_compartment_sweep(CELL_2C, fc, fs, 0.5, noise_sd=0.0)
    w = tp.try_whole_cell(y, fs, step, filter_hz=fc)
    assert w.method == "components" and len(w.components) == 2
    assert w.access_resistance == _approx(10.00 * MOhm, rel=0.01)
    for (tau, amp), tau_ref, amp_ref in zip(w.components, c["taus"], c["amps"]):
        assert tau == _approx(tau_ref, rel=0.02) and amp == _approx(amp_ref, rel=0.03)
    assert w.charge / (-5 * mV) == _approx(34.06 * pF, rel=0.01)
    assert w.tau == _approx(c["q"] / c["amps"].sum(), rel=0.02)   # charge-weighted τ
    assert w.access_se < 0.01 * w.access_resistance


def test_soma_faster_than_the_filter_gives_no_access_and_names_the_filter():
    # Ra 5 MΩ, soma 18 pF, coupling 20 MΩ: fast τ 70 µs, below 1/(2π·2 kHz) = 80 µs. Behind a
    # 2 kHz filter the fast component's amplitude is not determined (its charge is, ~12 pF,
    # too much for pipette capacitance): no value and the reason. Behind 10 kHz at 100 kHz the
    # same cell is resolved.
    cell = (5 * MOhm, 18 * pF, 800 * MOhm, 20 * MOhm, 40 * pF, 500 * MOhm)
    for phase in (0.2, 0.6, 1.0):
        y, step = _two_compartment_sweep(cell, 2e3, 20e3, phase,
                                         rng=np.random.default_rng(3))
        r = tp.try_whole_cell(y, 20e3, step, filter_hz=2e3)
        assert isinstance(r, tp.Rejected) and r.code in ("not_separable", "above_bound")
        assert "2000 Hz filter" in r.reason
    y, step = _two_compartment_sweep(cell, 10e3, 100e3, 0.5, rng=np.random.default_rng(3))
    w = tp.try_whole_cell(y, 100e3, step, filter_hz=10e3)
    assert w.access_resistance == _approx(5 * MOhm, rel=0.20)


def test_sweeps_fitted_with_the_averages_model_keep_their_own_values():
    # the analysis chooses the components once on the average of a file's sweeps and fits
    # each sweep with that choice: each sweep's access stays within 20 % (METHODS §1.5 cell)
    fs, fc = 25e3, 5e3
    rng = np.random.default_rng(12)
    sweeps = [_two_compartment_sweep(CELL_2C, fc, fs, ph, rng=rng, noise_sd=2 * pA)
              for ph in (0.1, 0.4, 0.7, 1.0)]
    resp = [tp.step_response(y, fs, s) for y, s in sweeps]
    model = tp.transient_model(tp.average_response(resp), filter_hz=fc).fit
    assert model.n == 2
    for r in resp:
        w = tp.whole_cell_of(r, filter_hz=fc, model=model)
        assert w.access_resistance == _approx(CELL_2C[0], rel=0.20)
        assert 0 < w.access_se < 0.2 * w.access_resistance


# --- access change with its uncertainty ---------------------------------------------------------

@pytest.mark.parametrize("two_compartment", [False, True], ids=["one-comp", "two-comp"])
def test_access_change_reads_three_percent_as_three_percent(two_compartment):
    # six sweeps: access 10.0 MΩ in the first three, 10.3 MΩ (+3 %) in the last three, the
    # rest of the cell unchanged; 5 kHz filter at 25 kHz, 1 pA noise (METHODS §1.1/§1.5 cells)
    fs, fc = 25e3, 5e3
    rng = np.random.default_rng(21)
    ra, se = [], []
    for k in range(6):
        r_a = (10.0 if k < 3 else 10.3) * MOhm
        if two_compartment:
            y, step = _two_compartment_sweep((r_a,) + CELL_2C[1:], fc, fs, 0.5, rng=rng)
        else:
            y, step = _cell_sweep((r_a,) + CELL_A[1:], fc, fs, 0.5, step_s=25e-3,
                                  noise_sd=1 * pA, rng=rng)
        w = tp.try_whole_cell(y, fs, step, filter_hz=fc)
        ra.append(w.access_resistance)
        se.append(w.access_se)
    pct, pct_se = tp.access_change(ra[:3], ra[-3:], se[:3], se[-3:])
    assert pct == _approx(3.0, abs=1.0)
    assert 0 < pct_se < 2.0
    assert abs(pct - 3.0) < 3 * pct_se + 0.5


def test_access_change_uncertainty_from_errors_or_scatter():
    # inverse-variance weighted means and the delta method for their ratio (common practice):
    # 3 + 3 values of 10 ± 0.1 and 11 ± 0.11 give 10 % ± 110·√((0.1/√3/10)² + (0.11/√3/11)²) %
    pct, se = tp.access_change([10, 10, 10], [11, 11, 11], [0.1] * 3, [0.11] * 3)
    assert pct == _approx(10.0, rel=1e-9)
    assert se == _approx(110 * math.hypot(0.1 / math.sqrt(3) / 10, 0.11 / math.sqrt(3) / 11),
                         rel=1e-9)
    # an uncertain sweep counts less: 10.5 ± 1 against two of 10 ± 0.1
    pct, _ = tp.access_change([10, 10, 10.5], [10, 10, 10], [0.1, 0.1, 1.0], [0.1] * 3)
    assert abs(pct) < 0.05
    # values scattering beyond their stated errors: the scatter sets the error (Birge ratio)
    _, se2 = tp.access_change([9, 10, 11], [10, 11, 12], [1e-6] * 3, [1e-6] * 3)
    assert se2 > 5.0


# --- steps that last to the end of the sweep --------------------------------------------------

def test_step_to_the_end_of_the_sweep_is_still_a_test_step():
    # a -10 mV step whose return is not recorded (the sweep ends during it); a lasting change
    # of 80 mV is a new holding level, not a test step
    fs, fc = 20e3, 5e3
    cmd = ref.command_trace(-80 * mV, -70 * mV, fs, n_pre=400, n_step=2000, n_post=0)
    assert tp.find_step(cmd, fs) is None                     # by default, as before
    s = tp.find_step(cmd, fs, open_max=20 * mV)
    assert s == tp.StepWindow(400, 2400, _approx(-10 * mV, rel=1e-9), True)
    hold = ref.command_trace(-150 * mV, -70 * mV, fs, n_pre=400, n_step=2000, n_post=0)
    assert tp.find_step(hold, fs, open_max=20 * mV) is None
    y = ref.sampled_cell(-10 * mV, *CELL_A, fs, n_pre=400, n_step=2000, filter_hz=fc,
                         noise_sd=0.5 * pA, rng=np.random.default_rng(4))
    e = _errors(whole_cell(y, fs, s, filter_hz=fc), CELL_A)
    assert abs(e[0]) < 0.05 and abs(e[1]) < 0.03 and abs(e[2]) < 0.05


# --- real recordings through the whole analysis -------------------------------------------------

_MEASURED: dict = {}


def _measured(name, **kw):
    from qcd.analyze import analyze_path
    key = (name, tuple(sorted(kw.items())))
    if key not in _MEASURED:
        _MEASURED[key] = analyze_path(abf(name), digest=False, **kw)
    return _MEASURED[key]


def _primary(fm):
    return next(c for c in fm.channels if c.index == fm.extra["primary_channel"])


def _pyabf_steps(name, current=0, command=None):
    """Per sweep: (current in A, start, stop, dV in V) from pyabf, independently of qcd: the
    epoch table's command waveform, or a recorded command channel (mV) split half-way
    between its first level and its extreme."""
    pyabf = pytest.importorskip("pyabf")
    a = pyabf.ABF(str(abf(name)))
    out = []
    for k in range(a.sweepCount):
        if command is None:
            a.setSweep(k, channel=current)
            c = np.asarray(a.sweepC, dtype=float)
        else:
            a.setSweep(k, channel=command)
            c = np.asarray(a.sweepY, dtype=float)
        a.setSweep(k, channel=current)
        y = np.asarray(a.sweepY, dtype=float) * pA
        ext = c[np.argmax(np.abs(c - c[0]))]
        away = np.flatnonzero(np.abs(c - c[0]) > abs(ext - c[0]) / 2)
        start = int(away[0])
        back = np.flatnonzero(np.abs(c[start:] - c[0]) <= abs(ext - c[0]) / 2)
        stop = start + int(back[0]) if len(back) else len(c)
        level = float(np.median(c[start:stop]))
        out.append((y, start, stop, (level - float(np.median(c[:start]))) * mV))
    return a, out


def _peak_bound(y, start, stop, dv):
    """dV / (peak transient - holding baseline): an upper bound on access, since a unity-gain
    low-pass only lowers the peak (METHODS §1.5). These recordings show no pipette spike."""
    peak = np.max((y[start:stop] - np.mean(y[:start])) * np.sign(dv))
    return abs(dv) / peak


# every real voltage-clamp recording with a whole-cell test step (MANIFEST.md), and where its
# step is: the epoch table, or the recorded command channel
REAL_WHOLE_CELL = {
    "vc_cell_step.abf": None, "vc_model_cell_step.abf": None, "vc_step_abf1.abf": None,
    "vc_step_series_tagged.abf": None, "vc_recorded_command_3ch.abf": None,
    "vc_tight_seal_noisy.abf": None, "vc_abf1_recorded_command_tags.abf": 1,
}


@pytest.mark.parametrize("name", sorted(REAL_WHOLE_CELL))
def test_real_access_is_never_above_dv_over_peak_transient(name):
    _, steps = _pyabf_steps(name, command=REAL_WHOLE_CELL[name])
    lengths = {len(y) for y, *_ in steps}
    y0, start, stop, dv = steps[0]
    avg = np.mean([y for y, *_ in steps], axis=0) if len(lengths) == 1 else y0
    bound = _peak_bound(avg, start, stop, dv)
    ms = _primary(_measured(name)).measures
    assert ms["access_resistance"].unit == "MOhm"
    assert 0 < ms["access_resistance"].value * MOhm <= bound
    assert ms["membrane_capacitance"].value > 0 and math.isfinite(ms["tau"].value)


def test_real_whole_cell_files_are_the_ones_with_access():
    # no other real recording gives an access value (open inputs, gap-free, current clamp,
    # step families and holding changes do not)
    with_access = set()
    for path in ABF_FILES:
        fm = _measured(path.name)
        if any("access_resistance" in c.measures for c in fm.channels):
            with_access.add(path.name)
    assert with_access == set(REAL_WHOLE_CELL)


@pytest.mark.parametrize("name", ["vc_step_abf1.abf", "vc_cell_step.abf"])
def test_real_cells_access_change_follows_the_peak_transients(name):
    # the per-sweep dV/peak transient moves with the access; its change, first 3 sweeps
    # against the last 3 (medians), computed here from pyabf, is within a few percent of
    # qcd's access_change_pct
    _, steps = _pyabf_steps(name)
    b = [_peak_bound(*s) for s in steps]
    peak_change = 100 * (np.median(b[-3:]) - np.median(b[:3])) / np.median(b[:3])
    assert abs(peak_change) < 5.0
    ms = _primary(_measured(name)).measures
    assert ms["access_change_pct"].value == _approx(peak_change, abs=3.0)


@pytest.mark.parametrize("name", ["four_channel_no_cell.abf", "four_channel_no_cell_abf1.abf"])
def test_open_inputs_give_no_seal_value(name):
    # MANIFEST.md: no cell attached. No seal value above 50 GΩ (tp.SEAL_MAX_OHM): a 10 mV step
    # drives only 0.2 pA through it, the size of an unconnected input's leakage and crosstalk
    # (common practice, from memory), while 10 GΩ is already an excellent seal (METHODS §2).
    # Here no channel gives one at all: channel 0's current builds up after the step (no
    # passive response), channels 2 and 3 read 59 and 311 GΩ, channel 1 shows nothing.
    fm = _measured(name)
    for ch in fm.channels:
        m = ch.measures.get("seal_resistance")
        assert m is None or (m.unit == "GOhm" and m.value <= tp.SEAL_MAX_OHM / GOhm)
        assert m is None, (ch.index, m)
        if any("test step from" in n for n in ch.notes):
            assert any("no seal value" in n or "no response above noise" in n
                       for n in ch.notes), ch.notes


def test_current_building_up_after_the_step_is_no_seal():
    # a passive seal (resistor, here with 3 pF of pipette capacitance) jumps and decays; a
    # current that builds up with a 0.6 ms time constant (as command crosstalk through an
    # input with nothing attached does) is no passive response (Foster form: an RC network's
    # step current has only decaying components of the step's sign)
    fs, fc = 20e3, 5e3
    seal, step = _resistor(5 * GOhm, 10 * mV, cp=3 * pF, noise_sd=0.2 * pA,
                           rng=np.random.default_rng(8))
    assert tp.builds_up(tp.step_response(seal, fs, step), filter_hz=fc) is None
    t = (np.arange(len(seal)) - step.start) / fs
    rise = np.where((t >= 0) & (t < (step.stop - step.start) / fs),
                    1 * pA * (1 - np.exp(-np.clip(t, 0, None) / 0.6e-3)), 0.0)
    rise = signal.lfilter(*signal.bessel(4, fc / (fs / 2), norm="mag"), rise)
    rise = rise + np.random.default_rng(9).normal(0, 0.05 * pA, len(rise))
    why = tp.builds_up(tp.step_response(rise, fs, step), filter_hz=fc)
    assert why is not None and "builds up" in why


def test_recorded_step_to_the_sweep_end_gives_total_resistance_by_hand():
    # vc_abf1_recorded_command_tags.abf: channel 1 records the command, a -10 mV step that
    # lasts to the end of each 1653-sample sweep. By hand, per sweep: dV / (mean current of
    # the last 20 % of the sweep - mean before the step), median over sweeps (Ohm's law).
    name = "vc_abf1_recorded_command_tags.abf"
    _, steps = _pyabf_steps(name, command=1)
    rt = []
    for y, start, stop, dv in steps:
        assert stop == len(y)
        di = np.mean(y[len(y) - len(y) // 5:]) - np.mean(y[:start])
        rt.append(dv / di)
    fm = _measured(name)
    ch = _primary(fm)
    total = (ch.measures["access_resistance"].value +
             ch.measures["membrane_resistance"].value) * MOhm
    assert total == _approx(float(np.median(rt)), rel=0.10)
    assert any("off-transient was not seen" in n for n in ch.notes)
    assert any("recorded command" in n for n in ch.notes)


def test_holding_change_stays_no_test_pulse():
    # vc_holding_change_pressure.abf: the command goes 0 -> -80 mV for the rest of the sweep,
    # a new holding level, not a test step (80 mV is above the 20 mV a lasting step may have)
    ch = _primary(_measured("vc_holding_change_pressure.abf"))
    assert "access_resistance" not in ch.measures and "seal_resistance" not in ch.measures
    assert any("no test step" in n for n in ch.notes)


# --- current clamp from a declared step, and the rig's recording mode --------------------------

def _cc_file(tmp_path, *, n_pre=800, n_step=4000, n_sweep=10000, fs=20e3):
    """ABF1 (pyabf's writer) with one mV channel and no command: a single-compartment cell,
    Rin 200 MΩ, τm 20 ms, -50 pA step -> -10 mV, resting at -65 mV (METHODS §1.4 [D])."""
    import pyabf.abfWriter
    sweeps = np.array([ref.sampled_current_clamp(-50 * pA, 200 * MOhm, 20e-3, fs, n_pre=n_pre,
                                                 n_step=n_step, n_post=n_sweep - n_pre - n_step,
                                                 filter_hz=5e3, noise_sd=0.05 * mV,
                                                 rng=np.random.default_rng(k))
                       for k in range(5)]) / mV
    path = tmp_path / "cc_declared.abf"
    pyabf.abfWriter.writeABF1(np.ascontiguousarray(sweeps), str(path), fs, "mV")
    return path, n_pre / fs, n_step / fs


def test_declared_step_on_a_voltage_input_means_current_clamp(tmp_path):
    # the step starts 40 ms into 500 ms sweeps, before the first 1/8 of the sweep (62.5 ms):
    # the baseline must end where the declared step starts
    from qcd.analyze import analyze_path
    from qcd.config import TestPulse
    path, start_s, length_s = _cc_file(tmp_path)
    plain = analyze_path(path, digest=False)
    assert plain.mode == "extracellular" and "input_resistance" not in plain.channels[0].measures
    for kw in ({}, {"mode": "current_clamp"}):
        fm = analyze_path(path, digest=False, pulse=TestPulse(-50.0, start_s, length_s), **kw)
        assert fm.mode == "current_clamp"
        ms = fm.channels[0].measures
        assert ms["input_resistance"].unit == "MOhm"
        assert ms["input_resistance"].value == _approx(200.0, rel=0.03)   # METHODS §1.4
        assert ms["holding"].unit == "mV"
        assert ms["holding"].value == _approx(-65.0, abs=0.5)
        assert any("declared pulse" in n for n in fm.channels[0].notes)


def test_rig_mode_from_config_and_scan_option(tmp_path, capsys):
    import json
    from qcd.cli import main
    from qcd.config import load_config
    from qcd.errors import ConfigError
    path, start_s, length_s = _cc_file(tmp_path)
    toml = tmp_path / "qcd.toml"
    toml.write_text(f'[[rig]]\nname = "cc-rig"\nfolders = ["{tmp_path}"]\n'
                    f'mode = "current_clamp"\n', encoding="utf-8")
    assert load_config(toml).rig("cc-rig").mode == "current_clamp"
    toml.write_text(f'[[rig]]\nname = "cc-rig"\nfolders = ["{tmp_path}"]\nmode = "cc"\n',
                    encoding="utf-8")
    with pytest.raises(ConfigError) as e:
        load_config(toml)
    assert "mode" in str(e.value) and "current_clamp" in str(e.value)
    pulse = f"-50,{start_s * 1e3:g},{length_s * 1e3:g}"
    assert main(["scan", "--json", "--mode", "current_clamp", f"--pulse={pulse}",
                 str(path)]) == 0
    doc = json.loads(capsys.readouterr().out.splitlines()[0])
    assert doc["mode"] == "current_clamp"
    rin = doc["channels"][0]["measures"]["input_resistance"]["value"]
    assert rin == _approx(200.0, rel=0.03)


def test_filter_corner_from_the_noise_spectrum_when_the_header_has_none(tmp_path):
    # pyabf's writer records no filter: the transient is fitted through the corner measured
    # from the noise spectrum (METHODS §5 corner estimate), and the note says so. Two-
    # compartment cell (METHODS §1.5) behind a 2 kHz 4-pole Bessel at 20 kHz, with noise
    # filtered the same way (tests/references.py analog_bessel_noise), declared -5 mV step.
    import pyabf.abfWriter
    from qcd.analyze import analyze_path
    from qcd.config import TestPulse
    fs, fc, n_pre, n_step = 20e3, 2e3, 2000, 800
    rng = np.random.default_rng(5)
    sweeps = []
    for _ in range(8):
        y = ref.sampled_two_compartment(-5 * mV, CELL_2C, fs, n_pre=n_pre, n_step=n_step,
                                        n_post=2000, filter_hz=fc, holding=-20 * pA)
        sweeps.append((y + 1.5 * pA * ref.analog_bessel_noise(rng, len(y), fs, fc)) / pA)
    path = tmp_path / "no_filter_in_header.abf"
    pyabf.abfWriter.writeABF1(np.ascontiguousarray(sweeps), str(path), fs, "pA")
    fm = analyze_path(path, digest=False, pulse=TestPulse(-5.0, n_pre / fs, n_step / fs))
    ch = fm.channels[0]
    assert ch.measures["corner_hz"].value == _approx(fc, rel=0.15)
    assert any("corner of the noise spectrum is used" in n for n in ch.notes)
    assert ch.measures["access_resistance"].value == _approx(CELL_2C[0] / MOhm, rel=0.20)
    assert abs(ch.measures["access_change_pct"].value) < 5.0      # the cell does not change


def test_sweep_that_does_not_fit_the_files_model_gives_no_value_and_the_reason():
    # a sweep whose current keeps growing during the step (a current activated by the
    # hyperpolarisation, -10 pA with τ 3 ms during a -5 mV step on the METHODS §1.1 cell),
    # held to the file's two-component model: a component of the opposite sign is no passive
    # cell (Foster form), so the sweep gives no value and says why
    fs, fc = 25e3, 5e3
    two = [_two_compartment_sweep(CELL_2C, fc, fs, 0.5, rng=np.random.default_rng(k))
           for k in range(3)]
    model = tp.transient_model(tp.average_response([tp.step_response(y, fs, s)
                                                    for y, s in two]), filter_hz=fc).fit
    assert model.n == 2
    y, step = _cell_sweep(CELL_A, fc, fs, 0.5, step_s=40e-3, noise_sd=1 * pA,
                          rng=np.random.default_rng(6))
    t = (np.arange(len(y)) - step.start) / fs
    inside = (t >= 0) & (t < (step.stop - step.start) / fs)
    y = y + np.where(inside, -10 * pA * (1 - np.exp(-np.clip(t, 0, None) / 3e-3)), 0.0)
    r = tp.whole_cell_of(tp.step_response(y, fs, step), filter_hz=fc, model=model)
    assert isinstance(r, tp.Rejected) and r.code == "bad_fit"
    assert "2-component fit" in r.reason and "opposite sign" in r.reason


def test_average_of_recorded_command_steps_that_differ_by_noise_and_a_sample():
    # a recorded command gives each sweep's step a slightly different size (its noise) and
    # length (a sample): such steps are averaged, aligned at the step and cut to the shortest;
    # steps of another size are not (a step family is no test pulse)
    fs, fc = 25e3, 5e3
    resp = []
    for k, (amp, extra) in enumerate(((-5.00, 0), (-5.02, 1), (-4.99, 0))):
        y, step = _cell_sweep(CELL_A, fc, fs, 0.5, dv=amp * mV, noise_sd=1 * pA,
                              rng=np.random.default_rng(k))
        resp.append(tp.step_response(y, fs, tp.StepWindow(step.start, step.stop + extra,
                                                            amp * mV)))
    avg = tp.average_response(resp)
    assert avg.sweeps == 3 and len(avg.y) == min(len(r.y) for r in resp)
    assert avg.amplitude == _approx(-5.0033 * mV, rel=1e-3)
    assert avg.noise == _approx(resp[0].noise / math.sqrt(3), rel=1e-9)
    w = tp.whole_cell_of(avg, filter_hz=fc)
    assert w.access_resistance == _approx(CELL_A[0], rel=0.05)
    y10, s10 = _cell_sweep(CELL_A, fc, fs, 0.5, dv=-10 * mV)
    with pytest.raises(ValueError):
        tp.average_response([resp[0], tp.step_response(y10, fs, s10)])


@pytest.mark.parametrize("fc", [1e3, 2e3, 5e3, 10e3, 123.4])
def test_bessel_lowpass_is_scipys_4_pole_bessel_bit_for_bit(fc):
    # reference: scipy.signal.bessel (norm="mag", -3 dB at the corner); qcd writes out the
    # 1 rad/s prototype and scales it as scipy does, so the poles and gain are the same floats
    from qcd.measures import transient as tr
    wo = 2 * math.pi * fc
    _, p, k = signal.bessel(4, wo, analog=True, norm="mag", output="zpk")
    lp = tr.LowPass.bessel(fc)
    assert lp.poles == tuple(complex(v) for v in p)
    res = [complex(k / np.prod([p[j] - p[m] for m in range(4) if m != j])) for j in range(4)]
    assert lp.residues == tuple(res)
    # -3 dB at the corner (definition of norm="mag") and unity DC gain
    H = lambda s: sum(r / (s - q) for r, q in zip(lp.residues, lp.poles))  # noqa: E731
    assert abs(H(1j * wo)) == pytest.approx(1 / math.sqrt(2), rel=1e-9)
    assert H(0).real == pytest.approx(1.0, rel=1e-12)
    # another order goes through scipy itself
    _, p2, _ = signal.bessel(2, wo, analog=True, norm="mag", output="zpk")
    assert tr.LowPass.bessel(fc, poles=2).poles == tuple(complex(v) for v in p2)


def test_measuring_a_test_pulse_loads_neither_scipy_signal_nor_scipy_stats():
    # start-up: scipy.signal brings scipy.stats along (about 0.35 s, measured); the model fit
    # needs neither. The F test's survival function is scipy.special.fdtrc, which is what
    # scipy.stats.f.sf computes (checked here on a few points, scipy as the reference)
    import subprocess
    import sys
    code = ("import sys; from qcd.measures import testpulse; "
            "print(sorted(m for m in ('scipy.signal', 'scipy.stats') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "[]"
    from scipy import special, stats
    for x, d1, d2 in [(0.0, 1, 5.0), (3.3, 2, 50.0), (12.0, 3, 7.5), (1e4, 1, 1.0)]:
        assert special.fdtrc(d1, d2, x) == stats.f.sf(x, d1, d2)
