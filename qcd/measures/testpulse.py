"""Test-pulse measures: step detection, whole-cell Ra/Rm/Cm/tau, seal, current-clamp input resistance.

Pure functions on numpy arrays in SI units (A, V, Ω, F, s); formulas and checks in
docs/methods.md §1. Imports numpy, scipy and qcd.measures.noise (the MAD scale).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import optimize

from qcd.measures.noise import MAD_SCALE

__all__ = [
    "StepWindow", "WholeCell", "Rejected", "CurrentClamp", "BESSEL4_DELAY", "OPEN_PIPETTE_MAX_OHM",
    "MAX_ACCESS_OHM",
    "find_step", "try_whole_cell", "peak_access_resistance", "seal_resistance",
    "seal_resistance_se",
    "input_resistance", "classify", "average_steps", "access_change_pct",
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

_MIN_STEP_SAMPLES = 20
_MIN_PRE_SAMPLES = 3
_MIN_FIT_SAMPLES = 10


@dataclass(frozen=True)
class StepWindow:
    """One rectangular test step within a sweep, in samples.

    start: first sample at the new level; stop: first sample back at holding;
    amplitude: step size in SI (V in voltage clamp, A in current clamp).
    """
    start: int
    stop: int
    amplitude: float


@dataclass(frozen=True)
class WholeCell:
    """Whole-cell test-pulse estimates, SI units.

    access_resistance, membrane_resistance, total_resistance (Ω); membrane_capacitance (F);
    tau (s); holding: pre-step mean current (A); i_ss: steady-state current change from holding
    (A); charge: transient charge Q = ∫(I - I_ss)dt (C); fit_start_s: start of the tail fit
    after onset; head: 'sampled' (charge integrated from the samples, filtered data) or
    'fitted' (the fitted exponential's integral from onset: sharp onset or pipette charge).
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


@dataclass(frozen=True)
class Rejected:
    """Why a sweep gave no whole-cell estimate: a stable code and one sentence."""
    code: str      # 'bad_step' | 'too_short' | 'not_finite' | 'clipped' | 'no_transient' | 'bad_fit'
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

def find_step(command: np.ndarray, fs: float, *, min_length_s: float = 1e-3) -> StepWindow | None:
    """The first clean rectangular step away from the holding level in a command trace.

    Parameters
    ----------
    command : recorded or reconstructed command (V in voltage clamp, A in current clamp).
    fs : sample rate (Hz).
    min_length_s : shortest step accepted (s).

    Returns
    -------
    StepWindow with ``start`` the first sample past half-way to the new level, ``stop`` the first
    sample back past half-way, and ``amplitude`` = median(level) - holding; None when the trace
    holds no such step (flat, noise only, ramps, a level change that never returns).

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
        if len(back) == 0:
            return None                      # a level change that never returns: not a pulse
        stop = start + int(back[0])
        length = stop - start
        ok = length >= min_len
        if ok:
            level = float(np.median(x[start:stop]))
            amp = level - hold
            tol = max(5.0 * sd, 0.02 * abs(amp), 1e-12 * scale)
            edge = max(3, int(0.02 * length))
            inner = x[start + edge:stop - edge] if length > 2 * edge else x[start:stop]
            ok = (len(inner) > 0 and np.all(np.abs(inner - level) <= tol)
                  and np.abs(x[start:stop] - level).mean() <= tol)
            # it must settle back at holding after the step
            post = x[stop + edge:min(n, stop + edge + min_len)]
            if ok and len(post):
                ok = bool(np.median(np.abs(post - hold)) <= tol)
            pre = x[max(0, first - min_len):first]
            if ok and len(pre):
                ok = bool(np.all(np.abs(pre - hold) <= max(tol, thresh)))
        if ok:
            return StepWindow(int(start), int(stop), float(amp))
        i = max(stop, first + 1)
    return None


# ---------------------------------------------------------------------------------------------
# voltage clamp
# ---------------------------------------------------------------------------------------------

def try_whole_cell(current: np.ndarray, fs: float, step: StepWindow, *,
                   filter_hz: float | None = None,
                   rails: tuple[float, float] | None = None) -> WholeCell | Rejected:
    """Whole-cell estimates from one voltage-clamp step, or why there are none.

    Parameters
    ----------
    current : sweep current (A); the samples before ``step.start`` are the holding baseline.
    fs : sample rate (Hz).
    step : the test step (amplitude dV in V).
    filter_hz : -3 dB corner of the amplifier's low-pass (4-pole Bessel assumed), or None.
    rails : converter limits in A; any sample at a rail rejects the sweep as clipped.

    Returns
    -------
    WholeCell, or Rejected(code, reason) when the sweep shows no membrane transient (the caller
    then uses `seal_resistance`), is too short, clipped or not finite.

    Notes
    -----
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
      half a sample before ``step.start`` (the true sampling phase is unknown: the error is at
      most a factor exp(±1/(2·fs·τ)) on Ra and Cm), when the onset is sharp (first sample at
      the new level ≥ 80% of the early peak: no filter at this rate), or when the sampled
      charge exceeds the fitted one by more than max(5%, 1.5·(exp(1/(2·fs·τ)) - 1)): extra
      charge from an uncompensated pipette capacitance hidden in the filtered rise.

    A slow component implying Ra > `MAX_ACCESS_OHM` is not taken for a membrane (seal with
    pipette-wall capacitance).
    """
    x = np.asarray(current, dtype=float)
    bad = _check_window(x, step)
    if bad is not None:
        return bad
    dv = float(step.amplitude)
    s = np.sign(dv)
    pre = x[:step.start]
    holding = float(np.mean(pre))
    noise = _noise_sd(pre) if len(pre) >= 8 else _noise_sd(x[step.start:step.stop])
    y = x[step.start:step.stop] - holding
    n = len(y)
    dt = 1.0 / fs
    tail_ref = float(np.mean(y[-max(n // 5, 1):]))
    if _clipped(y, noise, tail_ref, rails, x[:step.stop]):
        return Rejected("clipped", "the transient is clipped (flat top or converter rail)")
    t_d = BESSEL4_DELAY / filter_hz if filter_hz else 0.0
    # sample k of the step is at (k + 0.5)·dt after onset (mid-interval sampling phase)
    t = (np.arange(n) + 0.5) * dt
    early = y[:max(3, min(n, int(math.ceil(4 * t_d * fs)) + 3))] * s
    k_peak = int(np.argmax(early))
    sharp = early[0] >= 0.8 * early[k_peak]
    k0 = max(k_peak, int(math.ceil(3 * t_d * fs)))
    if n - k0 < _MIN_FIT_SAMPLES:
        return Rejected("too_short", f"{n - k0} samples after the transient peak, need"
                                     f" {_MIN_FIT_SAMPLES}")
    amp_peak = early[k_peak] - tail_ref * s
    if amp_peak <= max(4.0 * noise, 0.05 * abs(tail_ref)):
        return Rejected("no_transient", "no membrane transient above the noise")
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
    ys = np.concatenate(([x[step.start - 1] - holding], y[:k_fit + 1]))
    q_sampled = (float(np.sum((ys[1:] + ys[:-1]) * 0.5) * dt) - i_ss * (t[k_fit] - t_d)
                 + a_at_fit * tau)
    # Sampled charge beyond the fitted one by more than the sampling-phase uncertainty is a
    # fast component (uncompensated pipette capacitance adds Cp·dV, METHODS §1.2 caution).
    phase_tol = max(0.05, 1.5 * math.expm1(0.5 * dt / tau))
    excess = (q_sampled - q_fitted) / q_fitted if q_fitted * s > 0 else 0.0
    if sharp or excess > phase_tol:
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
    if ra > MAX_ACCESS_OHM:
        return Rejected("no_transient", f"slow component implies access {ra / 1e6:.0f} MOhm,"
                                        " beyond whole-cell values: a seal with pipette"
                                        " capacitance")
    cm = (q / dv) * (rt / rm) ** 2
    return WholeCell(access_resistance=float(ra), membrane_resistance=float(rm),
                     membrane_capacitance=float(cm), tau=float(tau), total_resistance=float(rt),
                     holding=holding, i_ss=float(i_ss), charge=float(q),
                     fit_start_s=float(t[k_fit]), head=head)


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
