"""Analytic reference signals and circuits for the tests, each with its source.

Test-pulse references (METHODS.md §1): the exact step response of Ra in series with Rm ∥ Cm
(closed form, METHODS §1.1 [D]; time-domain method of Lindau & Neher 1988), a seal or open
pipette (a pure resistor), and a current-clamp RC cell with an unbalanced bridge (Rall 1969
single compartment). Each can be passed through an analog Bessel low-pass (scipy.signal.bessel,
norm='mag', so ``filter_hz`` is the -3 dB point), simulated on a fine time grid with
scipy.signal.lsim and then sampled by picking grid points at an arbitrary sampling phase.
Imports numpy and scipy only (never qcd), so the references stay independent of the code under test.
"""
from __future__ import annotations

import functools
from typing import Any

import numpy as np
from scipy import signal

# ---------------------------------------------------------------------------------------------
# Test-pulse references (METHODS.md §1)
# ---------------------------------------------------------------------------------------------


def cell_step_current(t: np.ndarray, dv: float, ra: float, rm: float, cm: float) -> np.ndarray:
    """Exact current (A) after a voltage step dv (V) at t = 0 into Ra + (Rm ∥ Cm), ideal clamp.

    I(t) = dV/Rt + (dV/Ra - dV/Rt)·exp(-t/τ), τ = Cm·Ra·Rm/Rt, zero for t < 0
    (METHODS §1.1 closed form [D]).
    """
    t = np.asarray(t, dtype=float)
    rt = ra + rm
    tau = cm * ra * rm / rt
    out = dv / rt + (dv / ra - dv / rt) * np.exp(-np.clip(t, 0.0, None) / tau)
    return np.where(t > 0.0, out, 0.0)


def cell_constants(dv: float, ra: float, rm: float, cm: float) -> dict[str, float]:
    """METHODS §1.1 closed forms: I0, I_ss, A, tau, Q (SI) for a step dv into Ra + (Rm ∥ Cm)."""
    rt = ra + rm
    tau = cm * ra * rm / rt
    i0, iss = dv / ra, dv / rt
    return {"i0": i0, "i_ss": iss, "a": i0 - iss, "tau": tau, "q": (i0 - iss) * tau,
            "q_closed": dv * cm * (rm / rt) ** 2, "dvm_inf": dv * rm / rt}


def bessel_filter_ss(filter_hz: float, poles: int = 4):
    """Analog Bessel low-pass, -3 dB at filter_hz (scipy.signal.bessel, norm='mag'), as state space."""
    z, p, k = signal.bessel(poles, 2 * np.pi * filter_hz, btype="low", analog=True,
                            norm="mag", output="zpk")
    return signal.StateSpace(*signal.zpk2ss(z, p, k))


@functools.lru_cache(maxsize=32)
def _fine_sos(filter_hz: float, poles: int, dt: float) -> np.ndarray:
    """The analog Bessel filter discretized on the fine grid with a first-order hold.

    Equivalent to scipy.signal.lsim (which also interpolates the input linearly between grid
    points), run as second-order sections for speed.
    """
    ss = bessel_filter_ss(filter_hz, poles)
    ad, bd, cd, dd, _ = signal.cont2discrete((ss.A, ss.B, ss.C, ss.D), dt, method="foh")
    z, p, k = signal.ss2zpk(ad, bd, cd, dd)
    return signal.zpk2sos(z, p, k)


def _sample(fine_t: np.ndarray, fine_y: np.ndarray, fs: float, oversample: int, n_pre: int,
            n_total: int, phase: float, filter_hz: float | None, poles: int) -> np.ndarray:
    """Filter a fine-grid signal (onset at fine_t == 0) and pick one grid point per sample.

    The sample with index n_pre (the first sample at the new level) lands phase/fs after the
    onset, phase in (0, 1], rounded to the fine grid.
    """
    if filter_hz is not None:
        fine_y = signal.sosfilt(_fine_sos(filter_hz, poles, float(fine_t[1] - fine_t[0])), fine_y)
    j = int(round(phase * oversample))
    j = min(max(j, 1), oversample)
    onset = int(np.argmin(np.abs(fine_t)))
    idx = onset + j + (np.arange(n_total) - n_pre) * oversample
    if idx[0] < 0 or idx[-1] >= len(fine_t):
        raise ValueError("fine grid too short for the requested samples")
    return fine_y[idx]


def _fine_grid(fs: float, oversample: int, n_pre: int, n_total: int,
               n_step: int) -> tuple[np.ndarray, np.ndarray]:
    """Fine time grid (onset at exactly 0) and the time since the step's end, both exact
    multiples of the grid step, so a sample on a boundary sees the old level."""
    dt = 1.0 / (fs * oversample)
    k0 = (n_pre + 2) * oversample
    k1 = (n_total - n_pre + 2) * oversample
    k = np.arange(-k0, k1)
    return k * dt, (k - n_step * oversample) * dt


def _finish(t, t_off, y, *, dv, cp, tau_cp, fs, oversample, n_pre, n_total, phase, filter_hz,
            poles, holding, noise_sd, rng):
    """Add the pipette-capacitance transient, filter and sample, add holding and noise."""
    if cp:
        def _cp(tt):
            return np.where(tt > 0, cp * dv / tau_cp * np.exp(-np.clip(tt, 0, None) / tau_cp), 0.0)
        y = y + _cp(t) - _cp(t_off)
    out = _sample(t, y, fs, oversample, n_pre, n_total, phase, filter_hz, poles) + holding
    if noise_sd:
        out = out + (rng or np.random.default_rng(0)).normal(0.0, noise_sd, n_total)
    return out


def sampled_cell(dv: float, ra: float, rm: float, cm: float, fs: float, *, n_pre: int,
                 n_step: int, n_post: int = 0, filter_hz: float | None = None, poles: int = 4,
                 phase: float = 0.5, holding: float = 0.0, noise_sd: float = 0.0,
                 cp: float = 0.0, tau_cp: float = 20e-6, oversample: int = 40,
                 rng: np.random.Generator | None = None) -> np.ndarray:
    """A sampled voltage-clamp sweep (A) of Ra + (Rm ∥ Cm) for a rectangular step of n_step samples.

    On and off transients by superposition of the METHODS §1.1 closed form; ``cp`` adds an
    uncompensated pipette capacitance charged with time constant ``tau_cp`` (charge cp·dV,
    METHODS §1.2 caution); ``holding`` is the DC holding current; white Gaussian noise of SD
    ``noise_sd`` is added after filtering and sampling.
    """
    n_total = n_pre + n_step + n_post
    t, t_off = _fine_grid(fs, oversample, n_pre, n_total, n_step)
    y = cell_step_current(t, dv, ra, rm, cm) - cell_step_current(t_off, dv, ra, rm, cm)
    return _finish(t, t_off, y, dv=dv, cp=cp, tau_cp=tau_cp, fs=fs, oversample=oversample,
                   n_pre=n_pre, n_total=n_total, phase=phase, filter_hz=filter_hz, poles=poles,
                   holding=holding, noise_sd=noise_sd, rng=rng)


def _two_compartment_system(ra: float, cs: float, rs: float, rc: float, cd: float,
                            rd: float) -> tuple[np.ndarray, np.ndarray]:
    """State matrix and input vector of Ra -> soma (Cs ∥ Rs) -Rc- dendrite (Cd ∥ Rd).

    Kirchhoff's current law at the two nodes (state x = (Vs, Vd), input the command V):
    Cs·dVs/dt = (V - Vs)/Ra - Vs/Rs - (Vs - Vd)/Rc;  Cd·dVd/dt = (Vs - Vd)/Rc - Vd/Rd.
    """
    a = np.array([[-(1 / ra + 1 / rs + 1 / rc) / cs, 1 / (rc * cs)],
                  [1 / (rc * cd), -(1 / rc + 1 / rd) / cd]])
    b = np.array([1 / (ra * cs), 0.0])
    return a, b


def two_compartment_constants(dv: float, ra: float, cs: float, rs: float, rc: float,
                              cd: float, rd: float) -> dict[str, Any]:
    """Exact step response of the two-compartment cell (METHODS §1.5 [D]) by eigen-decomposition.

    After a step dv at t = 0 (both capacitors at their old voltage), the state is
    x(t) = x_ss - V·exp(Λt)·V⁻¹·x_ss with A = VΛV⁻¹ (the matrix exponential of the linear ODE),
    and the clamp current I = (dv - Vs)/Ra = I_ss + A₁e^(-t/τ₁) + A₂e^(-t/τ₂), τ₁ < τ₂.
    Returns taus (s), amps (A), i_ss (A), i0 = I(0⁺) = dv/Ra, q = ∫(I - I_ss)dt = Σ A_i·τ_i (C).
    """
    a, b = _two_compartment_system(ra, cs, rs, rc, cd, rd)
    lam, vec = np.linalg.eig(a)
    lam, vec = lam.real, vec.real                   # symmetric-izable: real eigenvalues
    x_ss = -np.linalg.solve(a, b * dv)
    # Vs(t) = Vs_ss - Σ_i vec[0, i]·c_i·exp(λ_i t), c = V⁻¹ x_ss
    c = np.linalg.solve(vec, x_ss)
    order = np.argsort(lam)                         # fastest (most negative λ) first
    taus = np.array([-1.0 / lam[i] for i in order])
    amps = np.array([vec[0, i] * c[i] / ra for i in order])
    i_ss = (dv - x_ss[0]) / ra
    return {"taus": taus, "amps": amps, "i_ss": float(i_ss), "i0": float(i_ss + amps.sum()),
            "q": float(np.sum(amps * taus)), "vs_ss": float(x_ss[0]), "vd_ss": float(x_ss[1])}


def two_compartment_current(t: np.ndarray, dv: float, ra: float, cs: float, rs: float,
                            rc: float, cd: float, rd: float) -> np.ndarray:
    """Exact clamp current (A) of the two-compartment cell after a step dv at t = 0 (0 before).

    Evaluated as the matrix exponential of the circuit's ODE (scipy.linalg.expm) at each time,
    independently of the eigen-decomposition in `two_compartment_constants`.
    """
    from scipy.linalg import expm
    a, b = _two_compartment_system(ra, cs, rs, rc, cd, rd)
    x_ss = -np.linalg.solve(a, b * dv)
    t = np.asarray(t, dtype=float)
    out = np.zeros_like(t)
    pos = t > 0
    if np.any(pos):
        tp_ = t[pos]
        # expm on a uniform grid: exp(A·k·h) = exp(A·h)^k, exact up to rounding
        h = float(np.min(np.diff(tp_))) if len(tp_) > 1 else float(tp_[0])
        k = np.rint(tp_ / h).astype(int)
        if np.allclose(k * h, tp_, rtol=0, atol=1e-3 * h):
            e1, ek = expm(a * h), expm(a * h * k[0])
            vs = np.empty(len(tp_))
            for j in range(len(tp_)):
                if j:
                    ek = np.linalg.matrix_power(e1, k[j] - k[j - 1]) @ ek
                vs[j] = x_ss[0] - (ek @ x_ss)[0]
        else:
            vs = np.array([x_ss[0] - (expm(a * tj) @ x_ss)[0] for tj in tp_])
        out[pos] = (dv - vs) / ra
    return out


def sampled_two_compartment(dv: float, cell: tuple[float, ...], fs: float, *, n_pre: int,
                            n_step: int, n_post: int = 0, filter_hz: float | None = None,
                            poles: int = 4, phase: float = 0.5, holding: float = 0.0,
                            noise_sd: float = 0.0, cp: float = 0.0, tau_cp: float = 20e-6,
                            oversample: int = 40,
                            rng: np.random.Generator | None = None) -> np.ndarray:
    """A sampled voltage-clamp sweep (A) of the two-compartment cell ``cell`` =
    (Ra, Cs, Rs, Rc, Cd, Rd) for a rectangular step of n_step samples (METHODS §1.5).

    On and off transients by superposition of the exact response; filter, sampling phase,
    pipette capacitance, holding and noise as in `sampled_cell`.
    """
    n_total = n_pre + n_step + n_post
    t, t_off = _fine_grid(fs, oversample, n_pre, n_total, n_step)
    k = two_compartment_constants(dv, *cell)

    def _i(tt):
        tc = np.clip(tt, 0.0, None)
        s = k["i_ss"] + sum(a * np.exp(-tc / tau) for a, tau in zip(k["amps"], k["taus"]))
        return np.where(tt > 0.0, s, 0.0)

    y = _i(t) - _i(t_off)
    return _finish(t, t_off, y, dv=dv, cp=cp, tau_cp=tau_cp, fs=fs, oversample=oversample,
                   n_pre=n_pre, n_total=n_total, phase=phase, filter_hz=filter_hz, poles=poles,
                   holding=holding, noise_sd=noise_sd, rng=rng)


def sampled_resistor(dv: float, r: float, fs: float, *, n_pre: int, n_step: int,
                     n_post: int = 0, filter_hz: float | None = None, poles: int = 4,
                     phase: float = 0.5, holding: float = 0.0, noise_sd: float = 0.0,
                     cp: float = 0.0, tau_cp: float = 20e-6, oversample: int = 40,
                     rng: np.random.Generator | None = None) -> np.ndarray:
    """A sampled voltage-clamp sweep (A) of a pure resistor r (seal or open pipette), I = dV/R.

    Ohm's law; METHODS §1.3 checks (1 GΩ at +10 mV gives 10.0 pA; 5 MΩ at 5 mV gives 1000 pA).
    """
    n_total = n_pre + n_step + n_post
    t, t_off = _fine_grid(fs, oversample, n_pre, n_total, n_step)
    y = np.where((t > 0) & (t_off <= 0), dv / r, 0.0)
    return _finish(t, t_off, y, dv=dv, cp=cp, tau_cp=tau_cp, fs=fs, oversample=oversample,
                   n_pre=n_pre, n_total=n_total, phase=phase, filter_hz=filter_hz, poles=poles,
                   holding=holding, noise_sd=noise_sd, rng=rng)


def sampled_current_clamp(di: float, rin: float, tau_m: float, fs: float, *, n_pre: int,
                          n_step: int, n_post: int = 0, r_bridge: float = 0.0,
                          filter_hz: float | None = None, poles: int = 4, phase: float = 0.5,
                          v_rest: float = -0.065, noise_sd: float = 0.0, oversample: int = 20,
                          rng: np.random.Generator | None = None) -> np.ndarray:
    """A sampled current-clamp sweep (V): single-compartment RC cell, current step di (A).

    V = V_rest + di·R_bridge (instantaneous, unbalanced bridge) + di·Rin·(1 - exp(-t/τm))
    [Rall 1969 single compartment; METHODS §1.4: -50 pA into 200 MΩ gives -10 mV, a 20 MΩ
    unbalanced bridge a -1.0 mV jump, τm 20 ms with Rin 200 MΩ means Cm 100 pF].
    """
    n_total = n_pre + n_step + n_post
    t, t_off = _fine_grid(fs, oversample, n_pre, n_total, n_step)

    def _r(tt):
        tc = np.clip(tt, 0, None)
        return np.where(tt > 0, di * r_bridge + di * rin * (1 - np.exp(-tc / tau_m)), 0.0)

    y = _r(t) - _r(t_off)
    out = _sample(t, y, fs, oversample, n_pre, n_total, phase, filter_hz, poles) + v_rest
    if noise_sd:
        out = out + (rng or np.random.default_rng(0)).normal(0.0, noise_sd, n_total)
    return out


def command_trace(level: float, holding: float, fs: float, *, n_pre: int, n_step: int,
                  n_post: int, noise_sd: float = 0.0, filter_hz: float | None = None,
                  rng: np.random.Generator | None = None) -> np.ndarray:
    """A recorded command channel (V or A): holding, a rectangular step to ``level``, holding.

    Optionally behind a 4-pole Bessel low-pass and with white noise (a recorded, not ideal, command).
    """
    y = np.full(n_pre + n_step + n_post, holding, dtype=float)
    y[n_pre:n_pre + n_step] = level
    if filter_hz is not None:
        b, a = signal.bessel(4, filter_hz / (fs / 2), norm="mag")
        y = signal.lfilter(b, a, y - holding, zi=None) + holding
    if noise_sd:
        y = y + (rng or np.random.default_rng(0)).normal(0.0, noise_sd, len(y))
    return y


# ---------------------------------------------------------------------------------------------
# Signals for the noise, spectrum and drift measures (tests/test_measures.py)
# ---------------------------------------------------------------------------------------------

K_BOLTZMANN = 1.380649e-23      # J/K, exact (SI 2019)
T_ROOM = 295.0                  # K, the temperature of METHODS §3.1's table


def johnson_density(r_ohm: float, t_k: float = T_ROOM) -> float:
    """One-sided current-noise density 4kT/R of a resistor, A^2/Hz (Johnson 1928; Nyquist 1928)."""
    return 4.0 * K_BOLTZMANN * t_k / r_ohm


def white_noise(rng: np.random.Generator, n: int, fs: float, density: float) -> np.ndarray:
    """White Gaussian noise of one-sided density ``density`` (unit^2/Hz): sd = sqrt(S fs/2)."""
    return rng.normal(0.0, np.sqrt(density * fs / 2.0), n)


def sine(n: int, fs: float, amplitude: float, freq_hz: float, phase: float = 0.0) -> np.ndarray:
    """amplitude * sin(2 pi f t + phase) sampled at fs; its RMS is amplitude/sqrt(2) (analytic)."""
    return amplitude * np.sin(2 * np.pi * freq_hz * np.arange(n) / fs + phase)


def analog_bessel_noise(rng: np.random.Generator, n: int, fs: float, fc: float, *,
                        poles: int = 4, oversample: int = 16) -> np.ndarray:
    """Unit white noise through an analog-like Bessel low-pass, then sampled at fs.

    The filter runs at fs*oversample (scipy's digital Bessel, -3 dB at fc, which matches the
    analog response far below that rate) and every oversample-th sample is kept, so the noise
    above fs/2 aliases as it does ahead of a real converter (METHODS §5 spectral test).
    """
    from scipy import signal
    hi = fs * oversample
    sos = signal.bessel(poles, fc, fs=hi, norm="mag", output="sos")
    return signal.sosfilt(sos, rng.normal(0.0, 1.0, n * oversample))[::oversample]
