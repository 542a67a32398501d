"""Signal and circuit models of the demo lab's recordings, and an ABF1 writer.

Test-pulse cell (Ra in series with Rm || Cm), seal, Bessel filter, thermal noise and mains hum:
the models tests/test_demo.py checks against the analytic references in tests/references.py.
The protocol constants are the demo rigs' (a 300 ms sweep with a 100 ms test step at 100 ms).
Imports numpy, scipy and pyabf (its writer); nothing from qcd.
"""
from __future__ import annotations

import functools
import math
import os
import struct
from datetime import datetime, timezone
from typing import Any
from pathlib import Path

import numpy as np

__all__ = ["MAINS_HZ", "BOLTZMANN", "TEMPERATURE_K", "SWEEP_S", "STEP_START_S", "STEP_LEN_S",
           "WHOLE_CELL_STEP_V", "SEAL_STEP_V", "cell_step_current", "seal_step_current",
           "bessel_lowpass", "thermal_noise_rms", "hum_wave", "whole_cell_sweeps", "seal_sweeps",
           "field_trace", "write_abf1"]

MAINS_HZ = 50.0                 # the invented building's mains frequency
BOLTZMANN = 1.380649e-23        # J/K (SI, exact)
TEMPERATURE_K = 295.0
SWEEP_S = 0.30                  # one episodic sweep
STEP_START_S = 0.10             # declared test step: starts 100 ms into each sweep ...
STEP_LEN_S = 0.10               # ... and lasts 100 ms
WHOLE_CELL_STEP_V = -5e-3       # -5 mV test step (voltage clamp)
SEAL_STEP_V = 10e-3             # +10 mV seal test (cell-attached)


# ----------------------------------------------------------------------------- models

def cell_step_current(t_s: np.ndarray, dv: float, ra: float, rm: float, cm: float) -> np.ndarray:
    """Current (A) of Ra in series with Rm||Cm after an ideal voltage step dv at t = 0.

    I(t) = dv/Rt + (dv/Ra - dv/Rt) exp(-t/tau), Rt = Ra + Rm, tau = Cm Ra Rm / Rt; zero up to
    and at t = 0 (a sample on the boundary sees the old level). Source: the time-domain test-pulse method (Lindau & Neher 1988); closed form
    derived in docs/methods.md §1.1.
    """
    t = np.asarray(t_s, dtype=float)
    rt = ra + rm
    tau = cm * ra * rm / rt
    i = dv / rt + (dv / ra - dv / rt) * np.exp(-np.clip(t, 0.0, None) / tau)
    return np.where(t > 0.0, i, 0.0)


def seal_step_current(t_s: np.ndarray, dv: float, rseal: float) -> np.ndarray:
    """Current (A) through a seal resistance after a voltage step dv at t = 0 (Ohm's law)."""
    t = np.asarray(t_s, dtype=float)
    return np.where(t >= 0.0, dv / rseal, 0.0)


def bessel_lowpass(x: np.ndarray, fs: float, fc: float, poles: int = 4) -> np.ndarray:
    """Analog Bessel low-pass, -3 dB at fc (scipy.signal.bessel, norm='mag'), unity DC gain,
    applied to samples at fs by first-order-hold discretisation (exact for an input that is
    linear between samples, as scipy.signal.lsim assumes)."""
    from scipy.signal import sosfilt
    return sosfilt(_bessel_sos(float(fs), float(fc), int(poles)), x, axis=-1)


@functools.lru_cache(maxsize=16)
def _bessel_sos(fs: float, fc: float, poles: int) -> np.ndarray:
    from scipy.signal import bessel, cont2discrete, zpk2sos
    z, p, k = bessel(poles, 2.0 * np.pi * fc, btype="low", analog=True, norm="mag",
                     output="zpk")
    zd, pd, kd, _ = cont2discrete((z, p, k), 1.0 / fs, method="foh")
    return zpk2sos(np.atleast_1d(zd), pd, float(np.real(kd)))


def thermal_noise_rms(resistance_ohm: float, bandwidth_hz: float,
                      temperature_k: float = TEMPERATURE_K) -> float:
    """Johnson-Nyquist current noise sqrt(4kTB/R) in A (Johnson 1928; Nyquist 1928)."""
    return math.sqrt(4.0 * BOLTZMANN * temperature_k * bandwidth_hz / resistance_ohm)


def hum_wave(t_s: np.ndarray, f0_hz: float, amplitudes: tuple[float, ...],
             phases: tuple[float, ...] | None = None) -> np.ndarray:
    """Sum of mains harmonics: sum_h A_h sin(2 pi h f0 t + phi_h); A_h is the peak amplitude."""
    t = np.asarray(t_s, dtype=float)
    out = np.zeros_like(t)
    for h, a in enumerate(amplitudes, start=1):
        phi = phases[h - 1] if phases else 0.0
        out += a * np.sin(2.0 * np.pi * h * f0_hz * t + phi)
    return out


def _noise(rng: np.random.Generator, n: int, sd: float, fs: float, fc: float) -> np.ndarray:
    """White Gaussian noise filtered by the rig's Bessel filter, scaled to sd after filtering."""
    pad = 256
    raw = rng.standard_normal(n + pad)
    y = bessel_lowpass(raw, fs, fc)[pad:]
    return y * (sd / max(float(np.std(y)), 1e-30))


def whole_cell_sweeps(rng: np.random.Generator, *, n_sweeps: int, fs: float, fc: float,
                      ra: float, rm: float, cm: float, noise_sd: float,
                      hum_amps: tuple[float, ...], holding: float,
                      hum_phase: float = 0.0, t0_s: float = 0.0) -> np.ndarray:
    """Voltage-clamp sweeps (A): holding + filtered test-step response + noise + hum."""
    n = int(round(SWEEP_S * fs))
    over = 40                                  # simulate the cell at 40x, filter, then sample
    on, length = round(STEP_START_S * fs) * over, round(STEP_LEN_S * fs) * over
    k = np.arange(n * over)                    # integer grid: the onset falls exactly on t = 0
    step = (cell_step_current((k - on) / (fs * over), WHOLE_CELL_STEP_V, ra, rm, cm)
            - cell_step_current((k - on - length) / (fs * over), WHOLE_CELL_STEP_V, ra, rm,
                                cm))
    clean = bessel_lowpass(step, fs * over, fc)[::over]
    t = np.arange(n) / fs
    out = np.empty((n_sweeps, n))
    for k in range(n_sweeps):
        tk = t + t0_s + k * SWEEP_S
        out[k] = (holding + clean + _noise(rng, n, noise_sd, fs, fc)
                  + hum_wave(tk, MAINS_HZ, hum_amps, (hum_phase, 0.7, 1.9)))
    return out


def seal_sweeps(rng: np.random.Generator, *, n_sweeps: int, fs: float, fc: float,
                seals: tuple[float, ...], noise_sd: float, hum_amps: tuple[float, ...],
                holding: float, hum_phase: float = 0.0) -> np.ndarray:
    """Cell-attached seal tests (A): a +10 mV step through seal resistance seals[k] per sweep."""
    n = int(round(SWEEP_S * fs))
    t = np.arange(n) / fs
    out = np.empty((n_sweeps, n))
    for k in range(n_sweeps):
        rs = seals[k]
        step = (seal_step_current(t - STEP_START_S, SEAL_STEP_V, rs)
                - seal_step_current(t - STEP_START_S - STEP_LEN_S, SEAL_STEP_V, rs))
        out[k] = (holding + bessel_lowpass(step, fs, fc) + _noise(rng, n, noise_sd, fs, fc)
                  + hum_wave(t + k * SWEEP_S, MAINS_HZ, hum_amps, (hum_phase, 0.7, 1.9)))
    return out


def field_trace(rng: np.random.Generator, *, fs: float, fc: float, duration_s: float,
                noise_sd: float, hum_amps: tuple[float, ...], offset: float,
                hum_phase: float = 0.0) -> np.ndarray:
    """Extracellular field recording (V), gap-free: offset + filtered noise + hum."""
    n = int(round(duration_s * fs))
    t = np.arange(n) / fs
    return (offset + _noise(rng, n, noise_sd, fs, fc)
            + hum_wave(t, MAINS_HZ, hum_amps, (hum_phase, 0.7, 1.9)))[None, :]


# ----------------------------------------------------------------------------- ABF writing

def write_abf1(path: Path, sweeps: np.ndarray, fs: float, unit: str, recorded_at: float,
               gap_free: bool = False, zone: Any = timezone.utc) -> None:
    """Write sweeps (display unit, one row per sweep) as ABF1 with pyabf's writer.

    pyabf's writer leaves the start date at zero (readers then fall back to the file's creation
    time), so the ABF1 header's lFileStartDate (offset 20, YYYYMMDD), lFileStartTime (24,
    seconds since midnight) and nFileStartMillisecs (366) are filled in afterwards as the
    wall clock of ``zone`` (a tzinfo; UTC by default), as an acquisition PC writes its own.
    A gap-free file gets nOperationMode 3 (offset 8). The file mtime is set to the end of the
    simulated acquisition.
    """
    import pyabf.abfWriter
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".part")
    pyabf.abfWriter.writeABF1(np.ascontiguousarray(sweeps, dtype=float), str(tmp), fs, unit)
    when = datetime.fromtimestamp(recorded_at, tz=zone)
    with open(tmp, "r+b") as f:
        if gap_free:
            f.seek(8)
            f.write(struct.pack("<h", 3))
        f.seek(20)
        f.write(struct.pack("<ii", when.year * 10000 + when.month * 100 + when.day,
                            when.hour * 3600 + when.minute * 60 + when.second))
        f.seek(366)
        f.write(struct.pack("<h", when.microsecond // 1000))
    duration = sweeps.size / fs
    os.utime(tmp, (recorded_at + duration, recorded_at + duration))
    os.replace(tmp, path)
