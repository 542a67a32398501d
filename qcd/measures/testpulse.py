"""Test-pulse measures: seal, step classification, current-clamp input resistance, access change.

The measures callers use, gathered in one place: step detection and averaging come from
qcd.measures.steps, the whole-cell fit (Ra/Rm/Cm/τ) from qcd.measures.wholecell. Pure functions
on numpy arrays in SI units (A, V, Ω, F, s); formulas and checks in docs/methods.md §1.
Imports numpy, qcd.measures.steps, qcd.measures.wholecell and qcd.measures.transient.
"""
from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from qcd.measures import transient as tr
from qcd.measures.steps import (
    BESSEL4_DELAY, MAX_ACCESS_OHM, MAX_ACCESS_REL_SE, OPEN_PIPETTE_MAX_OHM, PIPETTE_MAX_F,
    SEAL_MAX_OHM, _MIN_FIT_SAMPLES, _MIN_PRE_SAMPLES, _MIN_STEP_SAMPLES, CurrentClamp, Rejected,
    StepResponse, StepWindow, WholeCell, _check_window, _fit_exp, _noise_sd, _window_mean_se,
    average_response, average_steps, find_step, step_response,
)
from qcd.measures.wholecell import (
    _lowpass, peak_access_resistance, resolvable_tau, transient_model, try_whole_cell,
    whole_cell_of,
)

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
