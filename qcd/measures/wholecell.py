"""Whole-cell access, membrane resistance, capacitance and τ from a voltage-clamp step.

One to three exponential components convolved with the amplifier's 4-pole Bessel low-pass
(qcd.measures.transient), chosen on the average of a file's sweeps; the one-component charge
method where the fast component is not resolved. Pure functions on numpy arrays in SI units;
formulas and checks in docs/methods.md §1. Imports numpy, qcd.measures.transient and
qcd.measures.steps.
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from qcd.measures import transient as tr
from qcd.measures.steps import (
    BESSEL4_DELAY, MAX_ACCESS_OHM, MAX_ACCESS_REL_SE, PIPETTE_MAX_F, _MIN_FIT_SAMPLES,
    Rejected, StepResponse, StepWindow, WholeCell, _fit_exp, step_response,
)


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
