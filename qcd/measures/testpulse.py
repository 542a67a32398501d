"""Test-pulse measures: step detection, whole-cell Ra/Rm/Cm/tau, seal, current-clamp input resistance.

Pure functions on numpy arrays in SI units (A, V, Ω, F, s); formulas and checks in
docs/methods.md §1. The multi-exponential fit through the amplifier's filter lives in
qcd.measures.transient. Imports numpy, scipy, qcd.measures.noise (the MAD scale) and
qcd.measures.transient.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Sequence

import numpy as np
from scipy import optimize

from qcd.measures import transient as tr
from qcd.measures.noise import MAD_SCALE

__all__ = [
    "StepWindow", "WholeCell", "Rejected", "CurrentClamp", "StepResponse", "BESSEL4_DELAY",
    "OPEN_PIPETTE_MAX_OHM", "MAX_ACCESS_OHM", "MAX_ACCESS_REL_SE", "SEAL_MAX_OHM",
    "PIPETTE_MAX_F",
    "find_step", "step_response", "average_response", "resolvable_tau", "transient_model",
    "try_whole_cell", "whole_cell_of", "peak_access_resistance", "seal_resistance",
    "seal_resistance_se",
    "input_resistance", "classify", "builds_up", "average_steps", "access_change_pct",
    "access_change",
]

# DC group delay of a 4-pole Bessel low-pass, times its -3 dB corner (METHODS §1.2 [D]).
BESSEL4_DELAY = 0.3364
# Below this a no-transient response is an open pipette, above it a seal. Pipettes are
# 2-20 MΩ (METHODS §2, common practice); 50 MΩ leaves room for a partly blocked tip.
OPEN_PIPETTE_MAX_OHM = 50e6
# A slow transient implying a larger access is not a membrane (pipette-wall components of a
# seal): whole-cell access is ~1.5-3x a 2-8 MΩ pipette (METHODS §2, common practice), and even
# a resealing cell stays well below this.
MAX_ACCESS_OHM = 100e6
# No seal value above this: a 10 mV step drives 0.2 pA through 50 GΩ, the size of the
# leakage and command crosstalk an amplifier input shows with nothing attached (common
# practice, from memory), so a larger dV/dI says nothing about a seal; 10 GΩ is already an
# excellent seal (METHODS §2) and METHODS §1.3 has ΔI reach the noise there.
SEAL_MAX_OHM = 50e9
# Charge faster than the data resolve is taken for uncompensated pipette capacitance (METHODS
# §1.2 caution) up to this much per volt of step: pipette, holder and headstage input
# together stay below about 10 pF before compensation (common practice, from memory). More
# fast charge is a membrane component (a soma behind a slow filter) whose amplitude, and
# access with it, the samples do not determine.
PIPETTE_MAX_F = 10e-12
# An access estimate whose standard error exceeds this fraction of it is not given: the
# fastest component is not told apart from the filter (or the pipette charge).
MAX_ACCESS_REL_SE = 0.2

_MIN_STEP_SAMPLES = 20
_MIN_PRE_SAMPLES = 3
_MIN_FIT_SAMPLES = 10


@dataclass(frozen=True)
class StepWindow:
    """One rectangular test step within a sweep, in samples.

    start: first sample at the new level; stop: first sample back at holding (the trace's
    length when ``to_end``); amplitude: step size in SI (V in voltage clamp, A in current
    clamp); to_end: the step lasts to the end of the trace (its return was not recorded).
    """
    start: int
    stop: int
    amplitude: float
    to_end: bool = False


@dataclass(frozen=True)
class WholeCell:
    """Whole-cell test-pulse estimates, SI units.

    access_resistance, membrane_resistance, total_resistance (Ω); membrane_capacitance (F);
    tau (s); holding: pre-step mean current (A); i_ss: steady-state current change from holding
    (A); charge: transient charge Q = ∫(I - I_ss)dt (C); fit_start_s: start of the tail fit
    after onset; head: 'sampled' (charge integrated from the samples, filtered data) or
    'fitted' (the fitted exponential's integral from onset: sharp onset or pipette charge) or
    'components' (two or three components fitted through the filter). access_se: standard
    error of the access resistance (Ω); peak_bound: dV / peak transient (Ω), the upper bound
    access passed; components: (τ s, onset amplitude A) per component, fastest first; method:
    'charge' (one component) or 'components'.
    """
    access_resistance: float
    membrane_resistance: float
    membrane_capacitance: float
    tau: float
    total_resistance: float
    holding: float
    i_ss: float
    charge: float
    fit_start_s: float
    head: str
    access_se: float = math.nan
    peak_bound: float = math.nan
    components: tuple[tuple[float, float], ...] = ()
    method: str = "charge"


@dataclass(frozen=True)
class Rejected:
    """Why a sweep gave no whole-cell estimate: a stable code and one sentence."""
    code: str      # 'bad_step' | 'too_short' | 'not_finite' | 'clipped' | 'no_transient' |
    #               'bad_fit' | 'not_separable' | 'above_bound'
    reason: str


@dataclass(frozen=True)
class CurrentClamp:
    """Current-clamp step estimates, SI units.

    input_resistance (Ω) with the bridge jump excluded; delta_v_ss: steady-state voltage change
    (V, jump included); bridge_jump: instantaneous di·R_bridge jump (V) or None when the
    charging curve could not be fitted; tau_m (s) and membrane_capacitance = tau_m/Rin (F) or
    None; baseline: pre-step mean voltage (V).
    """
    input_resistance: float
    delta_v_ss: float
    bridge_jump: float | None
    tau_m: float | None
    membrane_capacitance: float | None
    baseline: float


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------

def _noise_sd(x: np.ndarray) -> float:
    """Robust white-noise SD from first differences: 1.4826·MAD(diff)/√2 (common practice)."""
    if len(x) < 3:
        return 0.0
    d = np.diff(x)
    return float(MAD_SCALE * np.median(np.abs(d - np.median(d))) / math.sqrt(2.0))


def _noise_correlation(x: np.ndarray, max_lag: int = 20) -> float:
    """Correlation factor of a baseline's noise, 1 + 2·Σ_k (1 - k/K)·ρ_k (Bartlett-weighted
    sample autocorrelation up to lag K): the factor by which correlated (filtered) noise
    inflates the variance of averages over it, 1 for white noise (common practice)."""
    x = np.asarray(x, dtype=float)
    n = len(x)
    if n < 16:
        return 1.0
    d = x - np.mean(x)
    v = float(d @ d) / n
    if v <= 0:
        return 1.0
    k_max = min(max_lag, n // 4)
    rho = np.array([float(d[:-k] @ d[k:]) / (n * v) for k in range(1, k_max + 1)])
    w = 1.0 - np.arange(1, k_max + 1) / (k_max + 1)
    return float(max(1.0, 1.0 + 2.0 * np.sum(w * rho)))


def _window_mean_se(x: np.ndarray, blocks: int = 10) -> tuple[float, float]:
    """Mean of x and its standard error from block means (robust to correlated, filtered noise)."""
    m = float(np.mean(x))
    k = min(blocks, len(x) // 4)
    if k < 3:
        return m, float(np.std(x) / math.sqrt(max(len(x), 1)))
    bm = np.array([b.mean() for b in np.array_split(x, k)])
    return m, float(np.std(bm, ddof=1) / math.sqrt(k))


def _check_window(x: np.ndarray, step: StepWindow) -> Rejected | None:
    if not (math.isfinite(step.amplitude) and step.amplitude != 0.0):
        return Rejected("bad_step", f"step amplitude {step.amplitude!r} is zero or not finite")
    if step.start < _MIN_PRE_SAMPLES:
        return Rejected("too_short", f"{step.start} pre-step samples, need {_MIN_PRE_SAMPLES} for"
                                     " the holding baseline")
    if step.stop > len(x):
        return Rejected("bad_step", f"step ends at sample {step.stop}, sweep has {len(x)}")
    if step.stop - step.start < _MIN_STEP_SAMPLES:
        return Rejected("too_short", f"step has {step.stop - step.start} samples, need at least"
                                     f" {_MIN_STEP_SAMPLES}")
    if not np.all(np.isfinite(x[:step.stop])):
        return Rejected("not_finite", "sweep holds NaN or infinite samples")
    return None


def _clipped(y: np.ndarray, noise: float, ref: float, rails: tuple[float, float] | None,
             raw: np.ndarray) -> bool:
    """Clipping: a sample at or beyond the rails, or a flat top of >= 3 equal extreme samples."""
    if rails is not None:
        lo, hi = min(rails), max(rails)
        if np.any(raw <= lo) or np.any(raw >= hi):
            return True
    k = int(np.argmax(np.abs(y)))
    ext = y[k]
    if abs(ext - ref) <= 10 * noise + 1e-3 * abs(ext):
        return False
    run = 1
    j = k + 1
    while j < len(y) and y[j] == ext:
        run += 1
        j += 1
    return run >= 3


def _fit_exp(t: np.ndarray, y: np.ndarray, tau0: float, tau_lo: float, tau_hi: float
             ) -> tuple[float, float, float, float]:
    """Least-squares y ≈ c + a·exp(-t/τ) by variable projection over log τ.

    Returns (c, a, tau, tau_se) with a the amplitude at t = 0.
    """
    ones = np.ones_like(t)

    def _lin(tau: float) -> tuple[np.ndarray, float]:
        m = np.column_stack([ones, np.exp(-(t - t[0]) / tau)])
        coef, *_ = np.linalg.lstsq(m, y, rcond=None)
        r = y - m @ coef
        return coef, float(r @ r)

    lo, hi = math.log(max(tau_lo, tau0 / 30)), math.log(min(tau_hi, tau0 * 30))
    if hi <= lo:
        lo, hi = math.log(tau_lo), math.log(tau_hi)
    res = optimize.minimize_scalar(lambda u: _lin(math.exp(u))[1], bounds=(lo, hi),
                                   method="bounded", options={"xatol": 1e-6})
    tau = math.exp(res.x)
    (c, a1), sse = _lin(tau)
    e = np.exp(-(t - t[0]) / tau)
    jac = np.column_stack([ones, e, a1 * (t - t[0]) / tau ** 2 * e])
    dof = max(len(t) - 3, 1)
    try:
        cov = np.linalg.inv(jac.T @ jac) * (sse / dof)
        tau_se = float(math.sqrt(max(cov[2, 2], 0.0)))
    except np.linalg.LinAlgError:
        tau_se = math.inf
    a0 = a1 * math.exp(t[0] / tau)          # amplitude referred to t = 0
    return float(c), float(a0), tau, tau_se


# ---------------------------------------------------------------------------------------------
# step detection
# ---------------------------------------------------------------------------------------------

def find_step(command: np.ndarray, fs: float, *, min_length_s: float = 1e-3,
              open_max: float | None = None) -> StepWindow | None:
    """The first clean rectangular step away from the holding level in a command trace.

    Parameters
    ----------
    command : recorded or reconstructed command (V in voltage clamp, A in current clamp).
    fs : sample rate (Hz).
    min_length_s : shortest step accepted (s).
    open_max : largest |amplitude| (SI) of a step that is still at its level when the trace
        ends (a test step whose return was not recorded); None: such a level change is not a
        pulse. A larger change is a new holding level.

    Returns
    -------
    StepWindow with ``start`` the first sample past half-way to the new level, ``stop`` the first
    sample back past half-way (the trace's end, with ``to_end``), and ``amplitude`` =
    median(level) - holding; None when the trace holds no such step (flat, noise only, ramps, a
    level change that never returns, unless within ``open_max``).

    Notes
    -----
    Holding is the median of the samples before the first departure; the departure threshold is
    6 robust noise SDs. A step is "clean" when it reaches its level within max(3 samples, 2% of
    its length) and stays within max(5 SD, 2% of the amplitude) of it (common practice).
    """
    x = np.asarray(command, dtype=float)
    n = len(x)
    if n < 4 or not np.all(np.isfinite(x)):
        return None
    sd = _noise_sd(x)
    scale = float(np.max(np.abs(x))) or 1.0
    thresh = max(6.0 * sd, 1e-9 * scale)
    min_len = max(int(math.ceil(min_length_s * fs)), 2)
    # holding: the level at the start of the trace
    hold = float(np.median(x[:max(3, min(n // 20, 50))]))
    i = 0
    while i < n:
        dev = np.nonzero(np.abs(x[i:] - hold) > thresh)[0]
        if len(dev) == 0:
            return None
        first = i + int(dev[0])
        # provisional level: median over the next min_len samples
        seg_end = min(n, first + min_len)
        level = float(np.median(x[first:seg_end]))
        amp = level - hold
        if abs(amp) <= thresh:
            i = first + 1
            continue
        half = hold + amp / 2
        on = (x - half) * np.sign(amp) > 0
        start = first + int(np.argmax(on[first:]))
        back = np.nonzero(~on[start:])[0]
        to_end = len(back) == 0
        if to_end and open_max is None:
            return None                      # a level change that never returns: not a pulse
        stop = n if to_end else start + int(back[0])
        length = stop - start
        ok = length >= min_len
        if ok:
            level = float(np.median(x[start:stop]))
            amp = level - hold
            tol = max(5.0 * sd, 0.02 * abs(amp), 1e-12 * scale)
            edge = max(3, int(0.02 * length))
            tail = 0 if to_end else edge
            inner = x[start + edge:stop - tail] if length > 2 * edge else x[start:stop]
            ok = (len(inner) > 0 and np.all(np.abs(inner - level) <= tol)
                  and np.abs(x[start:stop] - level).mean() <= tol)
            # it must settle back at holding after the step
            post = x[stop + edge:min(n, stop + edge + min_len)]
            if ok and len(post):
                ok = bool(np.median(np.abs(post - hold)) <= tol)
            pre = x[max(0, first - min_len):first]
            if ok and len(pre):
                ok = bool(np.all(np.abs(pre - hold) <= max(tol, thresh)))
            if ok and to_end:
                ok = abs(amp) <= open_max
        if ok:
            return StepWindow(int(start), int(stop), float(amp), to_end)
        if to_end:
            return None
        i = max(stop, first + 1)
    return None


# ---------------------------------------------------------------------------------------------
# voltage clamp
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class StepResponse:
    """One voltage step's current relative to the pre-step holding mean, checked (SI units).

    y: current - holding from `transient.LEAD` samples before the step's first sample to its
    end; amplitude: dV (V); holding: pre-step mean (A); noise: robust white-noise SD of the
    baseline (A); fs (Hz); sweeps: how many sweeps were averaged into it; noise_corr: the
    baseline noise's correlation factor (`_noise_correlation`).
    """
    y: np.ndarray
    fs: float
    amplitude: float
    holding: float
    noise: float
    sweeps: int = 1
    noise_corr: float = 1.0


def step_response(current: np.ndarray, fs: float, step: StepWindow, *,
                  rails: tuple[float, float] | None = None) -> StepResponse | Rejected:
    """The step's current relative to holding, or why the sweep cannot be used.

    Rejected codes: 'bad_step', 'too_short' (fewer than 3 pre-step samples or 20 step
    samples), 'not_finite', 'clipped' (a sample at a converter rail, or a flat top of >= 3
    equal extreme samples).
    """
    x = np.asarray(current, dtype=float)
    bad = _check_window(x, step)
    if bad is not None:
        return bad
    pre = x[:step.start]
    holding = float(np.mean(pre))
    noise = _noise_sd(pre) if len(pre) >= 8 else _noise_sd(x[step.start:step.stop])
    y = x[step.start - tr.LEAD:step.stop] - holding
    n = step.stop - step.start
    tail_ref = float(np.mean(y[-max(n // 5, 1):]))
    if _clipped(y[tr.LEAD:], noise, tail_ref, rails, x[:step.stop]):
        return Rejected("clipped", "the transient is clipped (flat top or converter rail)")
    return StepResponse(y, float(fs), float(step.amplitude), holding, noise, 1,
                        _noise_correlation(pre))


def average_response(responses: Sequence[StepResponse]) -> StepResponse:
    """Mean of like steps (same rate; amplitudes within 2 %, as a recorded command's are):
    noise falls by √N (METHODS §1.3). Aligned at the step's first sample and cut to the
    shortest; the amplitude is the mean."""
    if not responses:
        raise ValueError("average_response needs at least one response")
    amps = np.array([r.amplitude for r in responses])
    if np.ptp(amps) > 0.02 * float(np.max(np.abs(amps))):
        raise ValueError(f"steps differ in size: {amps.min():.4g} to {amps.max():.4g}")
    n = min(len(r.y) for r in responses)
    w = np.array([r.sweeps for r in responses], dtype=float)
    k = float(w.sum())
    y = np.sum([r.y[:n] * r.sweeps for r in responses], axis=0) / k
    r0 = responses[0]
    return StepResponse(y, r0.fs, float(np.sum(amps * w) / k),
                        float(np.sum([r.holding * r.sweeps for r in responses]) / k),
                        r0.noise / math.sqrt(k), int(k),
                        float(np.median([r.noise_corr for r in responses])))


def resolvable_tau(fs: float, filter_hz: float | None) -> float:
    """Shortest component time constant (s) told apart from the filter and the pipette charge.

    One sample interval, and behind a low-pass its time constant 1/(2π·fc): a faster
    component reaches the samples only as its charge, the same shape as an uncompensated
    pipette-capacitance spike (METHODS §1.2), so its onset amplitude, and Ra with it, is not
    determined.
    """
    lo = 1.0 / fs
    if filter_hz:
        lo = max(lo, 1.0 / (2 * math.pi * filter_hz))
    return lo


def _lowpass(filter_hz: float | None) -> tr.LowPass | None:
    return tr.LowPass.bessel(filter_hz) if filter_hz else None


def transient_model(resp: StepResponse, *, filter_hz: float | None = None) -> tr.Selection:
    """Choose 1-3 exponential components for a step response (best on an average of sweeps).

    The sum of exponentials convolved with the 4-pole Bessel low-pass at ``filter_hz``
    (unfiltered when None) is fitted from the onset; a further component is taken only when
    it passes an F-test and is physical (`transient.select_components`). Pass the chosen
    ``Selection.fit`` as ``model`` to `whole_cell_of` for each sweep.
    """
    s = float(np.sign(resp.amplitude))
    peak = float(np.max(resp.y * s))
    return tr.select_components(resp.y, resp.fs, _lowpass(filter_hz), s,
                                tau_lo=resolvable_tau(resp.fs, filter_hz),
                                noise_floor=max(resp.noise, 1e-4 * abs(peak)),
                                noise_corr=resp.noise_corr)


def try_whole_cell(current: np.ndarray, fs: float, step: StepWindow, *,
                   filter_hz: float | None = None,
                   rails: tuple[float, float] | None = None,
                   model: tr.ExpFit | None = None) -> WholeCell | Rejected:
    """Whole-cell estimates from one voltage-clamp step, or why there are none.

    Parameters
    ----------
    current : sweep current (A); the samples before ``step.start`` are the holding baseline.
    fs : sample rate (Hz).
    step : the test step (amplitude dV in V).
    filter_hz : -3 dB corner of the amplifier's low-pass (4-pole Bessel assumed), or None.
    rails : converter limits in A; any sample at a rail rejects the sweep as clipped.
    model : the component model chosen on the average of the file's sweeps
        (`transient_model`); None chooses one for this sweep alone.

    Returns
    -------
    WholeCell, or Rejected(code, reason); see `whole_cell_of`.
    """
    r = step_response(current, fs, step, rails=rails)
    if isinstance(r, Rejected):
        return r
    return whole_cell_of(r, filter_hz=filter_hz, model=model)


def whole_cell_of(resp: StepResponse, *, filter_hz: float | None = None,
                  model: tr.ExpFit | None = None) -> WholeCell | Rejected:
    """Whole-cell access, membrane resistance, capacitance and τ of one step response.

    Parameters
    ----------
    resp : from `step_response` (one sweep) or `average_response`.
    filter_hz : -3 dB corner of the amplifier's low-pass (4-pole Bessel assumed), or None.
    model : components chosen on an average (`transient_model`); None chooses here.

    Returns
    -------
    WholeCell, or Rejected(code, reason): 'too_short', 'no_transient' (no membrane transient:
    the caller then uses `seal_resistance`), 'bad_fit' (the fit does not converge or is not a
    passive cell), 'not_separable' (the fastest component is not told apart from the filter),
    'above_bound' (the estimate exceeds dV / peak transient).

    Notes
    -----
    Any passive cell (one compartment, or soma plus dendrites) answers a step dV with
    I(t) = I_ss + Σ A_i·exp(-t/τ_i); at the onset every capacitor still holds its old voltage,
    so I(0⁺) = dV/Ra exactly and **Ra = dV/(I_ss + Σ A_i)** for any number of compartments
    (METHODS §1.5 [D]). The sum, convolved with the known low-pass, is fitted from the onset
    with 1 to 3 components (`transient.select_components`: F-test, components of the step's
    sign, time constants above `resolvable_tau`); each A_i is the amplitude at the onset, i.e.
    the fitted tail divided by H(-1/τ_i) (METHODS §1.2). Rt = dV/I_ss (steady state), Rm = Rt - Ra.

    **Capacitance** is Cm = (Q/dV)·(Rt/Rm)² from the total transient charge
    Q = ∫(I - I_ss)dt = Σ A_i·τ_i (METHODS §1.1 charge estimator): exact for one compartment;
    with dendrites it is the whole cell's capacitance weighted by how far each part's voltage
    follows the step (Taylor 2012), so it lies between the soma's and the whole cell's
    capacitance. It is taken because the charge is what the filter and the sampling phase
    leave intact (unity DC gain) and because the fast component alone (the soma) depends on
    how well the components separate. ``tau`` is the charge-weighted time constant Q/ΣA_i
    (the single τ of one compartment), so Ra = dV/(I_ss + Q/τ) holds in both cases.

    With one component the estimate is the one-exponential charge method (`_one_exponential`,
    METHODS §1.1-1.2), which also handles an uncompensated pipette capacitance and
    unfiltered, coarsely sampled data. Every estimate must pass physical sanity: access at
    most dV / (peak transient - 2 noise SD) after the holding baseline and the pipette spike
    (a unity-gain low-pass only lowers the peak, METHODS §1.5), its standard error at most
    20 % (else the fastest component is not separable from the filter), Ra and Rm positive,
    Cm positive and finite, Ra at most `MAX_ACCESS_OHM`.
    """
    fs = resp.fs
    dv = resp.amplitude
    s = float(np.sign(dv))
    y = resp.y[tr.LEAD:]
    n = len(y)
    dt = 1.0 / fs
    noise = resp.noise
    tail_ref = float(np.mean(y[-max(n // 5, 1):]))
    t_d = BESSEL4_DELAY / filter_hz if filter_hz else 0.0
    early = y[:max(3, min(n, int(math.ceil(4 * t_d * fs)) + 3))] * s
    k_peak = int(np.argmax(early))
    k0 = max(k_peak, int(math.ceil(3 * t_d * fs)))
    if n - k0 < _MIN_FIT_SAMPLES:
        return Rejected("too_short", f"{n - k0} samples after the transient peak, need"
                                     f" {_MIN_FIT_SAMPLES}")
    amp_peak = early[k_peak] - tail_ref * s
    if amp_peak <= max(4.0 * noise, 0.05 * abs(tail_ref)):
        return Rejected("no_transient", "no membrane transient above the noise")
    sharp = bool(early[0] >= 0.8 * early[k_peak])
    lp = _lowpass(filter_hz)
    tau_lo = resolvable_tau(fs, filter_hz)
    refused: tuple[str, ...] = ()
    fast_fit = None
    if model is None:
        sel = transient_model(resp, filter_hz=filter_hz)
        fit, refused, fast_fit = sel.fit, sel.refused, sel.fast_fit
        if sel.fast_charge * s > PIPETTE_MAX_F * abs(dv):
            corner = f"the {filter_hz:.4g} Hz filter" if filter_hz else "the sampling"
            return Rejected("not_separable",
                            f"a fast component ({sel.fast_charge / dv * 1e12:.3g} pF of "
                            f"charge, faster than {corner} resolves, "
                            f"{resolvable_tau(fs, filter_hz) * 1e6:.3g} us) is too large for "
                            f"pipette capacitance: access is not determined")
    else:
        fit = tr.fit_components(resp.y, fs, lp, model.n, taus0=model.taus, onset0=model.onset,
                                tau_lo=tau_lo, noise_corr=resp.noise_corr)
        why = "the fit failed" if fit is None else tr.refusal(fit, s, tau_lo, n * dt / 2)
        if why is not None:
            if model.n > 1:
                return Rejected("bad_fit", f"{model.n}-component fit of this sweep: {why}")
            fit = None
        fast_fit = fit
    if fit is not None and fit.n > 1:
        w = _from_components(resp, fit)
        if isinstance(w, Rejected):
            return w
    else:
        w = _one_exponential(resp, filter_hz, k0, sharp)
        if isinstance(w, Rejected):
            return w
        if fit is not None and fit.onset_current * s > 0:
            rel = fit.onset_current_se / abs(fit.onset_current)
            w = replace(w, access_se=w.access_resistance * rel)
    return _sanity(w, resp, fast_fit, lp, filter_hz, refused)


def _from_components(resp: StepResponse, fit: tr.ExpFit) -> WholeCell | Rejected:
    """Ra, Rm, Cm, τ from a fit of two or three components (see `whole_cell_of`)."""
    dv = resp.amplitude
    i0 = fit.onset_current
    if not (i0 * dv > 0 and fit.i_ss * dv > 0):
        return Rejected("bad_fit", "onset or steady-state current has the opposite sign of "
                                   "the step")
    ra = dv / i0
    rt = dv / fit.i_ss
    rm = rt - ra
    q = fit.charge
    amps = float(np.sum(fit.amps))
    tau = q / amps if amps else math.nan
    cm = (q / dv) * (rt / rm) ** 2 if rm else math.nan
    return WholeCell(access_resistance=float(ra), membrane_resistance=float(rm),
                     membrane_capacitance=float(cm), tau=float(tau), total_resistance=float(rt),
                     holding=resp.holding, i_ss=float(fit.i_ss), charge=float(q),
                     fit_start_s=0.0, head="components",
                     access_se=float(abs(ra) * fit.onset_current_se / abs(i0)),
                     components=tuple(zip(fit.taus, fit.amps)), method="components")


def _sanity(w: WholeCell, resp: StepResponse, fast_fit: tr.ExpFit | None,
            lp: tr.LowPass | None, filter_hz: float | None,
            refused: tuple[str, ...]) -> WholeCell | Rejected:
    """Physical bounds on an estimate (see `whole_cell_of`), with the bound stored."""
    dv = resp.amplitude
    s = float(np.sign(dv))
    ra, rm, cm = w.access_resistance, w.membrane_resistance, w.membrane_capacitance
    if not (ra > 0 and rm > 0):
        return Rejected("bad_fit", f"implausible resistances Ra {ra:.3g}, Rm {rm:.3g} ohm")
    if not (math.isfinite(cm) and cm > 0):
        return Rejected("bad_fit", f"capacitance {cm:.3g} F is not positive and finite")
    if ra > MAX_ACCESS_OHM:
        return Rejected("no_transient", f"slow component implies access {ra / 1e6:.0f} MOhm,"
                                        " beyond whole-cell values: a seal with pipette"
                                        " capacitance")
    y = resp.y[tr.LEAD:] * s
    if fast_fit is not None and (fast_fit.q_p * s > 0 or fast_fit.taus[0] <=
                                 1.01 * resolvable_tau(resp.fs, filter_hz)):
        # the pipette charge (and what else is faster than the data resolve) as fitted: the
        # membrane's peak is what remains
        y = y - tr.fast_part(fast_fit, resp.fs, lp, len(resp.y),
                             resolvable_tau(resp.fs, filter_hz))[tr.LEAD:] * s
    elif lp is None or fast_fit is None or not fast_fit.q_p:
        # no filter to carry it: a pipette spike faster than a sample is below e^-3 of its
        # size three samples after the onset
        y = y[3:]
    peak = float(np.max(y)) - 2.0 * resp.noise
    bound = abs(dv) / peak if peak > 0 else math.inf
    w = replace(w, peak_bound=float(bound))
    corner = f"the {filter_hz:.4g} Hz filter" if filter_hz else "the sampling"
    if w.access_se > MAX_ACCESS_REL_SE * ra:
        return Rejected("not_separable", f"the fastest component is not separable from "
                                         f"{corner} (access {ra / 1e6:.3g} +- "
                                         f"{w.access_se / 1e6:.2g} MOhm)")
    if ra > bound:
        more = f"; larger models: {'; '.join(refused)}" if refused else ""
        return Rejected("above_bound", f"access {ra / 1e6:.3g} MOhm is above dV / peak "
                                       f"transient {bound / 1e6:.3g} MOhm: the fastest "
                                       f"component is not resolved behind {corner}{more}")
    return w


def _one_exponential(resp: StepResponse, filter_hz: float | None, k0: int,
                     sharp: bool) -> WholeCell | Rejected:
    """The one-compartment charge method: tail fit, transient charge, Ra = dV/(I_ss + Q/τ).

    Circuit Ra + (Rm ∥ Cm) (METHODS §1.1; time-domain method, Lindau & Neher 1988). The tail
    I_ss + A·exp(-t/τ) is fitted from max(3·t_d, peak), t_d = 0.3364/fc (METHODS §1.2); the fit
    start moves on by τ/2 while τ is still changing (a fast pipette-capacitance component).
    τ comes from the fit (filters preserve the tail τ). The transient charge Q = ∫(I - I_ss)dt
    (unity-DC-gain filters preserve Q) gives Ra = dV/(I_ss + Q/τ), Rt = dV/I_ss, Rm = Rt - Ra,
    Cm = (Q/dV)(Rt/Rm)² (METHODS §1.1 charge estimators [D]).

    The head of Q (onset to fit start) is taken by rule:

    - 'sampled' (the default): trapezoid over the samples from the one before onset to the
      fit start, minus I_ss from onset + t_d, plus the fit's analytic tail. Exact for filtered
      data; on unfiltered, coarsely sampled data this Riemann sum is biased (METHODS §1.2
      caution), hence
    - 'fitted': the fitted exponential's analytic integral from onset + t_d, with the onset
      half a sample before the step's first sample (the true sampling phase is unknown: the
      error is at most a factor exp(±1/(2·fs·τ)) on Ra and Cm), when the onset is sharp
      (first sample at the new level ≥ 80% of the early peak: no filter at this rate), or when
      the sampled charge exceeds the fitted one by more than max(5%, 1.5·(exp(1/(2·fs·τ)) - 1)):
      extra charge from an uncompensated pipette capacitance hidden in the filtered rise.
    """
    fs = resp.fs
    dv = resp.amplitude
    s = np.sign(dv)
    y = resp.y[tr.LEAD:]
    n = len(y)
    dt = 1.0 / fs
    noise = resp.noise
    tail_ref = float(np.mean(y[-max(n // 5, 1):]))
    t_d = BESSEL4_DELAY / filter_hz if filter_hz else 0.0
    # sample k of the step is at (k + 0.5)·dt after onset (mid-interval sampling phase)
    t = (np.arange(n) + 0.5) * dt
    # first guess of τ: time for the excess over steady state to fall by 1/e
    excess = (y[k0:] - tail_ref) * s
    below = np.nonzero(excess <= excess[0] / math.e)[0]
    tau0 = (below[0] if len(below) else (n - k0) / 3) * dt
    tau0 = max(tau0, 0.5 * dt)
    fits = []
    k = k0
    for _ in range(5):
        if n - k < _MIN_FIT_SAMPLES:
            break
        c, a, tau, tau_se = _fit_exp(t[k:], y[k:], tau0, 0.1 * dt, 10.0 * n * dt)
        fits.append((k, c, a, tau, tau_se))
        if len(fits) >= 2:
            _, _, _, tp, sep = fits[-2]
            if abs(tau / tp - 1.0) <= max(0.03, 3.0 * math.hypot(tau_se, sep) / tp):
                fits.pop()                 # stable: keep the earlier fit (more samples)
                break
        k = k + max(1, int(round(0.5 * tau * fs)))
        tau0 = tau
    if not fits:
        return Rejected("too_short", "too few samples for the tail fit")
    k_fit, c, a, tau, tau_se = fits[-1]
    i_ss = c
    a_at_fit = a * math.exp(-t[k_fit] / tau)
    if not (math.isfinite(tau) and math.isfinite(c) and math.isfinite(a)):
        return Rejected("bad_fit", "the tail fit did not converge")
    if a_at_fit * s <= max(4.0 * noise, 0.02 * abs(i_ss)) or tau < 1.5 * dt:
        return Rejected("no_transient", "no membrane transient after the fast components"
                                        f" (tau {tau * 1e6:.1f} us)")
    if (n - k_fit) * dt < 3.0 * tau:
        return Rejected("too_short", f"step lasts {(n - k_fit) * dt * 1e3:.2f} ms after the fit"
                                     f" start, under 3 tau ({3 * tau * 1e3:.2f} ms)")
    if i_ss * s <= 0:
        return Rejected("bad_fit", "steady-state current has the opposite sign of the step")
    # fitted head: the exponential's integral from onset + t_d (onset at t = 0)
    q_fitted = a * tau * math.exp(-t_d / tau)
    # sampled head: ∫ of the filtered current from before onset, minus I_ss from onset + t_d
    # (the filter delays the steady-state part by its DC group delay, METHODS §1.2)
    ys = resp.y[tr.LEAD - 1:tr.LEAD + k_fit + 1]
    q_sampled = (float(np.sum((ys[1:] + ys[:-1]) * 0.5) * dt) - i_ss * (t[k_fit] - t_d)
                 + a_at_fit * tau)
    # Sampled charge beyond the fitted one by more than the sampling-phase uncertainty is a
    # fast component (uncompensated pipette capacitance adds Cp·dV, METHODS §1.2 caution).
    phase_tol = max(0.05, 1.5 * math.expm1(0.5 * dt / tau))
    extra = (q_sampled - q_fitted) / q_fitted if q_fitted * s > 0 else 0.0
    if sharp or extra > phase_tol:
        head, q = "fitted", q_fitted
    else:
        head, q = "sampled", q_sampled
    if q * s <= 0:
        return Rejected("bad_fit", "transient charge has the opposite sign of the step")
    rt = dv / i_ss
    ra = dv / (i_ss + q / tau)
    rm = rt - ra
    if not (ra > 0 and rm > 0):
        return Rejected("bad_fit", f"implausible resistances Ra {ra:.3g}, Rm {rm:.3g} ohm")
    cm = (q / dv) * (rt / rm) ** 2
    return WholeCell(access_resistance=float(ra), membrane_resistance=float(rm),
                     membrane_capacitance=float(cm), tau=float(tau), total_resistance=float(rt),
                     holding=resp.holding, i_ss=float(i_ss), charge=float(q),
                     fit_start_s=float(t[k_fit]), head=head,
                     components=((float(tau), float(q / tau)),))


def peak_access_resistance(current: np.ndarray, fs: float, step: StepWindow) -> float:
    """Naive access resistance dV/(I_peak - holding) (Ω), for comparison only.

    METHODS §1.1 "peak" estimator: biased high by the sampling phase and any low-pass filter
    (METHODS §1.2: 12.10 MΩ for a 10 MΩ cell behind a 4-pole 5 kHz Bessel at 25 kHz).
    """
    x = np.asarray(current, dtype=float)
    holding = float(np.mean(x[:step.start]))
    y = (x[step.start:step.stop] - holding) * np.sign(step.amplitude)
    return float(abs(step.amplitude) / np.max(y))


def _steady_window(x: np.ndarray, step: StepWindow, frac: float) -> np.ndarray:
    n = step.stop - step.start
    return x[step.stop - max(int(round(frac * n)), 1):step.stop]


def seal_resistance(current: np.ndarray, fs: float, step: StepWindow) -> float:
    """Seal (or open-pipette) resistance dV/ΔI_ss (Ω).

    ΔI_ss is the mean over the last 40% of the step (within METHODS §1.3's last 20–50%,
    common practice) minus the pre-step holding mean. Returns NaN when ΔI_ss is zero or of the
    opposite sign to dV (no resolvable response) or the window is unusable. In cell-attached
    mode this is Rseal ∥ (Rpatch + Rcell), a lower bound on Rseal (METHODS §1.3).
    """
    x = np.asarray(current, dtype=float)
    if _check_window(x, step) is not None:
        return math.nan
    di = float(np.mean(_steady_window(x, step, 0.4)) - np.mean(x[:step.start]))
    if di == 0.0 or np.sign(di) != np.sign(step.amplitude):
        return math.nan
    return float(step.amplitude / di)


def builds_up(resp: StepResponse, *, filter_hz: float | None = None) -> str | None:
    """Why a step's current is not the passive response of a seal, or None when it may be.

    A seal with its pipette is a passive RC network: after a voltage step its current jumps
    (within the filter's rise) and then only decays towards the steady state, every
    component of the step's sign (Foster form of an RC driving-point admittance). A current
    that instead builds up to its steady state over a time constant longer than the
    filter's (one fitted component through the filter of the opposite sign, at least 20 % of
    the steady current and 3 standard errors) is no seal: command crosstalk or an amplifier
    input with nothing attached.
    """
    s = float(np.sign(resp.amplitude))
    fit = tr.fit_components(resp.y, resp.fs, _lowpass(filter_hz), 1,
                            tau_lo=resolvable_tau(resp.fs, filter_hz),
                            noise_corr=resp.noise_corr)
    if fit is None or not fit.amps_se:
        return None
    a, se = fit.amps[0] * s, fit.amps_se[0]
    if a < 0 and -a > max(3 * se, 0.2 * abs(fit.i_ss)):
        return (f"the current builds up to its steady state over {fit.taus[0] * 1e3:.2g} ms "
                f"instead of jumping at the step: not a passive response (no seal; an input "
                f"with nothing attached, or command crosstalk)")
    return None


def seal_resistance_se(current: np.ndarray, fs: float, step: StepWindow) -> float:
    """Standard error (Ω) of `seal_resistance`, by the delta method: R·SE(ΔI)/|ΔI|.

    SE(ΔI) combines the block-mean standard errors (10 blocks) of the steady-state window
    (last 40% of the step) and of the pre-step baseline, so filtered (correlated) noise is
    not undercounted. METHODS §1.3: at ≥10 GΩ, average pulses and report the standard error
    (common practice). NaN when `seal_resistance` is NaN.
    """
    x = np.asarray(current, dtype=float)
    r = seal_resistance(x, fs, step)
    if not math.isfinite(r):
        return math.nan
    m, se = _window_mean_se(_steady_window(x, step, 0.4))
    pm, pse = _window_mean_se(x[:step.start])
    return float(abs(r) * math.hypot(se, pse) / abs(m - pm))


def classify(current: np.ndarray, fs: float, step: StepWindow, *,
             filter_hz: float | None = None,
             rails: tuple[float, float] | None = None) -> str:
    """What a voltage-clamp step response shows: 'whole_cell', 'seal', 'open_pipette' or 'none'.

    'whole_cell' when `try_whole_cell` finds a membrane transient; otherwise by the steady-state
    resistance: below `OPEN_PIPETTE_MAX_OHM` 'open_pipette', above it 'seal'. 'none' when the
    sweep is unusable (too short, clipped, not finite) or the steady-state change is not at least
    3 standard errors (block means over the last 40% of the step) in the step's direction: no
    resolvable response (an open circuit, or a seal beyond what one sweep resolves: average
    pulses, METHODS §1.3). Thresholds are common practice.
    """
    x = np.asarray(current, dtype=float)
    r = try_whole_cell(x, fs, step, filter_hz=filter_hz, rails=rails)
    if isinstance(r, WholeCell):
        return "whole_cell"
    if r.code in ("bad_step", "not_finite", "clipped") or (
            r.code == "too_short" and step.stop - step.start < _MIN_STEP_SAMPLES):
        return "none"
    if step.start < _MIN_PRE_SAMPLES:
        return "none"
    m, se = _window_mean_se(_steady_window(x, step, 0.4))
    pre = x[:step.start]
    pm, pse = _window_mean_se(pre)
    di = m - pm
    if di * np.sign(step.amplitude) < 3.0 * math.hypot(se, pse) or di == 0.0:
        return "none"
    return "open_pipette" if step.amplitude / di < OPEN_PIPETTE_MAX_OHM else "seal"


# ---------------------------------------------------------------------------------------------
# current clamp
# ---------------------------------------------------------------------------------------------

def input_resistance(voltage: np.ndarray, fs: float, step: StepWindow, *,
                     filter_hz: float | None = None) -> CurrentClamp | None:
    """Current-clamp input resistance Rin = (ΔV_ss - bridge jump)/ΔI (Ω), τm and Cm = τm/Rin.

    Parameters
    ----------
    voltage : sweep membrane voltage (V); samples before ``step.start`` are the baseline.
    fs : sample rate (Hz).
    step : the current step (amplitude ΔI in A), best a small hyperpolarising one.
    filter_hz : low-pass corner (4-pole Bessel assumed) or None; the fit starts after 3·t_d.

    Notes
    -----
    METHODS §1.4: ΔV_ss from the last 20% of the step (common practice); the charging curve
    V_ss + B·exp(-t/τm) is fitted after the instantaneous ΔI·R_bridge jump, and the jump is the
    fit's value at onset. When the step is shorter than 5 τm the fitted asymptote replaces the
    window mean. Single compartment: Cm = τm/Rin (Rall 1969). None when the window is unusable
    or ΔV has the opposite sign of ΔI.
    """
    x = np.asarray(voltage, dtype=float)
    if _check_window(x, step) is not None:
        return None
    di = float(step.amplitude)
    s = np.sign(di)
    base = float(np.mean(x[:step.start]))
    y = x[step.start:step.stop] - base
    n = len(y)
    dt = 1.0 / fs
    noise = _noise_sd(x[:step.start]) if step.start >= 8 else _noise_sd(y)
    dv_win = float(np.mean(y[-max(int(round(0.2 * n)), 1):]))
    if dv_win * s <= 0:
        return None
    t = (np.arange(n) + 0.5) * dt
    t_d = BESSEL4_DELAY / filter_hz if filter_hz else 0.0
    k0 = max(2, int(math.ceil(3 * t_d * fs)))
    tau_m = jump = None
    dv_ss = dv_win
    if n - k0 >= _MIN_FIT_SAMPLES:
        e = np.abs(y[k0:] - dv_win)
        below = np.nonzero(e <= e[0] / math.e)[0]
        tau0 = max((below[0] if len(below) else n / 3) * dt, dt)
        c, a, tau, _ = _fit_exp(t[k0:], y[k0:], tau0, 0.5 * dt, 20.0 * n * dt)
        fittable = (math.isfinite(tau) and 2 * dt < tau < 10.0 * n * dt
                    and -a * s > max(4.0 * noise, 0.02 * abs(c)) and c * s > 0)
        if fittable:
            tau_m = tau
            jump = c + a * math.exp(-t_d / tau)      # fitted value at onset (+ filter delay)
            if n * dt < 5 * tau:
                dv_ss = c
    rin = (dv_ss - (jump or 0.0)) / di
    if not rin > 0:
        return None
    cm = tau_m / rin if tau_m is not None else None
    return CurrentClamp(input_resistance=float(rin), delta_v_ss=float(dv_ss),
                        bridge_jump=None if jump is None else float(jump),
                        tau_m=tau_m, membrane_capacitance=cm, baseline=base)


# ---------------------------------------------------------------------------------------------
# across sweeps
# ---------------------------------------------------------------------------------------------

def average_steps(sweeps: Sequence[np.ndarray], step: StepWindow, *, off: bool = False,
                  fs: float | None = None, tau: float | None = None) -> np.ndarray:
    """Average of several sweeps with the same step, optionally folding in the off-transients.

    Parameters
    ----------
    sweeps : equal-length sweeps (SI), each with the step at ``step``.
    off : also use the sign-inverted off-transients (the response after ``step.stop``).
    fs, tau : sample rate (Hz) and a transient time constant (s); with ``off`` both half-pulses
        (step, and stop to the end of the sweep) must last at least 5·tau (METHODS §1.2 caution:
        half-pulses ≥ 5–10 τ, common practice), else only the on-transients are averaged.

    Returns
    -------
    One sweep-shaped array. With off-transients, samples in [start, stop) hold
    holding + (on(t) + plateau - off(t))/2, where on and off are relative to the pre-step holding
    mean and plateau is the mean of the last 20% of the averaged step; elsewhere the plain mean.
    Averaging lowers the noise by √N (METHODS §1.3: average pulses at high resistance).
    """
    if len(sweeps) == 0:
        raise ValueError("average_steps needs at least one sweep")
    lengths = {len(s) for s in sweeps}
    if len(lengths) != 1:
        raise ValueError(f"sweeps differ in length: {sorted(lengths)}")
    avg = np.mean(np.vstack([np.asarray(s, dtype=float) for s in sweeps]), axis=0)
    if not off:
        return avg
    n_on = step.stop - step.start
    n_off = len(avg) - step.stop
    if tau is None or fs is None or n_off < n_on or min(n_on, n_off) < 5 * tau * fs:
        return avg
    hold = float(np.mean(avg[:step.start]))
    on = avg[step.start:step.stop] - hold
    plateau = float(np.mean(on[-max(int(round(0.2 * n_on)), 1):]))
    offr = avg[step.stop:step.stop + n_on] - hold
    out = avg.copy()
    out[step.start:step.stop] = hold + 0.5 * (on + plateau - offr)
    return out


def access_change_pct(first_values: Sequence[float], last_values: Sequence[float]) -> float:
    """Change of access resistance from the first sweeps to the last, in percent.

    100·(median(last) - median(first))/median(first), NaNs ignored; e.g. the first 3 and last 3
    sweeps. METHODS §2: reject a cell when Ra changes by more than 20–25% (common practice).
    Raises ValueError when either group has no finite value or the first median is not positive.
    """
    a = np.asarray(first_values, dtype=float)
    b = np.asarray(last_values, dtype=float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if len(a) == 0 or len(b) == 0:
        raise ValueError("access_change_pct needs finite values in both groups")
    m0 = float(np.median(a))
    if not m0 > 0:
        raise ValueError(f"first access resistance median {m0!r} is not positive")
    return 100.0 * (float(np.median(b)) - m0) / m0


def _group_centre(values: np.ndarray, errors: np.ndarray) -> tuple[float, float]:
    """Centre of a group of sweeps' values and its standard error.

    With every standard error known, the inverse-variance weighted mean, its error
    (Σ 1/se²)^-1/2 scaled up by the Birge ratio √(χ²/(k-1)) when the values scatter more
    than their errors say; else the plain mean and SD/√k (common practice).
    """
    k = len(values)
    ok = np.isfinite(errors) & (errors > 0)
    if ok.all():
        w = 1.0 / errors ** 2
        m = float(np.sum(w * values) / np.sum(w))
        se = 1.0 / math.sqrt(float(np.sum(w)))
        if k > 1:
            chi2 = float(np.sum(w * (values - m) ** 2))
            se *= max(1.0, math.sqrt(chi2 / (k - 1)))
        return m, se
    m = float(np.mean(values))
    return m, (float(np.std(values, ddof=1)) / math.sqrt(k) if k > 1 else math.nan)


def access_change(first_values: Sequence[float], last_values: Sequence[float],
                  first_se: Sequence[float] | None = None,
                  last_se: Sequence[float] | None = None) -> tuple[float, float]:
    """Change of access from the first sweeps to the last (%), with its standard error (%).

    Each group's value is the mean weighted by the sweeps' own standard errors
    (`_group_centre`); the ratio's error by the delta method. NaNs are ignored. METHODS §2: reject a cell when Ra changes by more than 20-25% (common
    practice). Raises ValueError as `access_change_pct` does.
    """
    a = np.asarray(first_values, dtype=float)
    b = np.asarray(last_values, dtype=float)
    ea = np.full(len(a), np.nan) if first_se is None else np.asarray(first_se, dtype=float)
    eb = np.full(len(b), np.nan) if last_se is None else np.asarray(last_se, dtype=float)
    ka, kb = np.isfinite(a), np.isfinite(b)
    a, ea, b, eb = a[ka], ea[ka], b[kb], eb[kb]
    if len(a) == 0 or len(b) == 0:
        raise ValueError("access_change_pct needs finite values in both groups")
    m0, s0 = _group_centre(a, ea)
    m1, s1 = _group_centre(b, eb)
    if not m0 > 0:
        raise ValueError(f"first access resistance median {m0!r} is not positive")
    pct = 100.0 * (m1 - m0) / m0
    se = 100.0 * (m1 / m0) * math.hypot(s0 / m0, s1 / m1) if m1 > 0 else math.nan
    return pct, se
