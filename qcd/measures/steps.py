"""Test steps: finding a step in a command, the checked step response, averaging sweeps.

Pure functions on numpy arrays in SI units (A, V, Ω, F, s); formulas and checks in
docs/methods.md §1. The result types and thresholds shared by the test-pulse measures live
here; the whole-cell fit is qcd.measures.wholecell and the measures callers use are gathered in
qcd.measures.testpulse. Imports numpy, scipy, qcd.measures.noise (the MAD scale) and
qcd.measures.transient.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import optimize

from qcd.measures import transient as tr
from qcd.measures.noise import MAD_SCALE

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
