"""Mains hum by least squares in baseline windows too short for the PSD to resolve the line
(episodic pre-step baselines), with the noise bias measured beside each harmonic in the same
windows. numpy only, SI in and out; imports qcd.measures.mains (the Hum result).
"""
from __future__ import annotations

import math

import numpy as np

from qcd.measures.mains import DETECT_HARMONICS, Hum

__all__ = ["HumFit"]

_FIT_STANDS = 3.0        # standard errors a harmonic of the fit must stand above zero


class HumFit:
    """Mains hum by least squares in windows too short for the PSD to resolve the line.

    Episodic voltage-clamp files often have pre-step baselines of 40-200 ms: their periodogram
    bins are 5-25 Hz wide, so a 50 Hz line cannot be told from its neighbours. With the mains
    frequency known (the rig's ``mains_hz``), each window is fitted with a quadratic baseline
    (Legendre polynomials of degree 0-2) and a cosine/sine pair at every harmonic h f0 <=
    ``max_hz`` and at every probe frequency (j + 1/2) f0 halfway between them (linear least
    squares, common practice).

    The power of a pair in one window is (a^2 + b^2)/2. At a probe there is no mains, so its
    power is noise alone, and the noise density there is that power over the pair's gain
    g = ((X'X)^-1_aa + (X'X)^-1_bb)/2 x fs/2 (the gain of locally white noise). A harmonic's
    noise bias is its own gain times the density at h f0, interpolated between the probes
    beside it linearly in log density against log frequency (exact for a power-law spectrum:
    white, 1/f, 1/f^2), from the densities averaged over the windows, divided by the bias such
    a product of powers has on means of N exponential powers (E[m^w] = Gamma(N + w) /
    (Gamma(N) N^w) for each factor). Filtered, 1/f or any smooth
    noise is thus corrected for where it is, not as white noise spread to Nyquist. Corrected
    powers are averaged over windows (the phase differs from sweep to sweep, the power does not)
    without clipping. Standard errors: the scatter of the raw powers over windows plus, by the
    delta method, that of the probe densities. The quadratic baseline keeps slow drift out of
    the lowest probe; on very steep spectra (drift-dominated below the fundamental) windows of
    2.5-4 mains cycles still read within about 10 % (tested on a synthetic 1/f^3 floor and on a
    real gap-free recording against the PSD method). Units: squared input units.
    """

    _POLY = 2           # baseline polynomial degree
    MIN_CYCLES = 2.4    # shorter windows make the lowest probe nearly a baseline polynomial

    def __init__(self, n: int, fs: float, line_hz: float, max_hz: float = 1000.0) -> None:
        t = np.arange(n) / fs
        top = min(max_hz, 0.45 * fs)
        self.harmonics = [h for h in range(1, 41) if h * line_hz <= top]
        nh = len(self.harmonics)
        self.probes = [j + 0.5 for j in range(nh + 1) if (j + 0.5) * line_hz < 0.45 * fs]
        cols = []
        for f in [h * line_hz for h in self.harmonics] + [q * line_hz for q in self.probes]:
            w = 2 * np.pi * f * t
            cols += [np.cos(w), np.sin(w)]
        X = np.column_stack(cols)
        tc = (t - t.mean()) / max(t.max() - t.mean(), 1e-300)
        A = np.column_stack([np.polynomial.legendre.legval(tc, [0] * k + [1])
                             for k in range(self._POLY + 1)])
        X = X - A @ np.linalg.lstsq(A, X, rcond=None)[0]   # orthogonal to the baseline
        inv = np.linalg.inv(X.T @ X)
        self.pinv = inv @ X.T
        gain = 0.5 * (np.diag(inv)[0::2] + np.diag(inv)[1::2])
        self.gain_h, self.gain_p = gain[:nh], gain[nh:]
        self.line_hz = line_hz
        self._raw = np.zeros((2, nh))              # sum, sum of squares of pair powers
        self._tot = np.zeros(2)                    # ... of their sum over harmonics
        self._den = np.zeros((2, len(self.probes)))  # ... of probe densities (power / gain)
        self.count = 0

    @classmethod
    def fits(cls, n: int, fs: float, line_hz: float) -> bool:
        """Whether windows of n samples can carry the fit: 2.4 mains cycles, spare dof."""
        n_pairs = 2 * max(1, int(min(1000.0, 0.45 * fs) // line_hz)) + 1
        return n / fs >= cls.MIN_CYCLES / line_hz and n >= 4 * n_pairs + 10

    def add(self, blocks: np.ndarray) -> None:
        """Add (n_windows, n) windows (any offset and slow drift)."""
        C = np.einsum("bn,kn->bk", blocks, self.pinv)
        pw = 0.5 * (C[:, 0::2] ** 2 + C[:, 1::2] ** 2)
        nh = len(self.harmonics)
        raw, den = pw[:, :nh], pw[:, nh:] / self.gain_p
        tot = raw.sum(axis=1)
        self._raw += (raw.sum(axis=0), (raw * raw).sum(axis=0))
        self._tot += (float(tot.sum()), float(tot @ tot))
        self._den += (den.sum(axis=0), (den * den).sum(axis=0))
        self.count += blocks.shape[0]

    def _mean_var(self, acc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(mean, variance of the mean) from running sums; None-free for count < 3 (nan)."""
        n = self.count
        mean = acc[0] / n
        var = (np.maximum(acc[1] / n - mean * mean, 0.0) / (n - 1)) if n >= 3 else \
            np.full(np.shape(mean), np.nan)
        return mean, var

    def result(self) -> Hum:
        """The fitted hum as a Hum (source 'declared'; line_hz is the declared frequency)."""
        nh = len(self.harmonics)
        if not self.count:
            rows = tuple((h, h * self.line_hz, 0.0, 0.0) for h in self.harmonics)
            return Hum(self.line_hz, self.line_hz, "declared", False, None, rows, 0.0, 0.0)
        n = self.count
        raw, raw_var = self._mean_var(self._raw)
        tot, tot_var = self._mean_var(self._tot)
        den, den_var = self._mean_var(self._den)
        # E[m^w] for m the mean of n exponential powers over its expectation (Gamma(n, 1/n)):
        # the interpolated density is a product of such powers; divide the bias it leaves out
        def mean_pow(w: float) -> float:
            return math.exp(math.lgamma(n + w) - math.lgamma(n) - w * math.log(n))
        bias = np.zeros(nh)
        # d bias_h / d den_j, for the delta-method variance of the summed bias
        dbias = np.zeros((nh, len(self.probes)))
        for i, h in enumerate(self.harmonics):
            lo, hi = i, i + 1                      # probes h - 1/2 and h + 1/2
            if hi < len(self.probes) and den[lo] > 0 and den[hi] > 0:
                w_lo = math.log((h + 0.5) / h) / math.log((h + 0.5) / (h - 0.5))
                w_hi = 1.0 - w_lo
                bias[i] = self.gain_h[i] * math.exp(
                    w_lo * math.log(den[lo]) + w_hi * math.log(den[hi])) / (
                    mean_pow(w_lo) * mean_pow(w_hi))
                dbias[i, lo] = bias[i] * w_lo / den[lo]
                dbias[i, hi] = bias[i] * w_hi / den[hi]
            elif hi < len(self.probes):            # a probe without noise (digital zero)
                bias[i] = self.gain_h[i] * 0.5 * (den[lo] + den[hi])
                dbias[i, lo] = dbias[i, hi] = 0.5 * self.gain_h[i]
            else:
                bias[i] = self.gain_h[i] * den[lo]
                dbias[i, lo] = self.gain_h[i]
        p = raw - bias
        if n >= 3:
            var_h = raw_var + (dbias * dbias) @ den_var
            var_t = float(tot_var) + float((dbias.sum(axis=0) ** 2) @ den_var)
        else:
            # no scatter to go by: a window's pair power of noise is exponential, its SD its mean
            var_h = (bias + np.maximum(p, 0.0)) ** 2 / n
            var_t = float(var_h.sum())
        se = np.sqrt(var_h)
        rows = tuple((h, h * self.line_hz, float(p[i]), float(se[i]))
                     for i, h in enumerate(self.harmonics))
        # a harmonic 1-5 whose power stands 3 standard errors above zero (one-sided 0.13 %
        # each): a line of the declared mains seen in the fit
        stand = tuple(h for h, _, ph, e in rows
                      if h <= DETECT_HARMONICS and ph > _FIT_STANDS * e and ph > 0)
        return Hum(self.line_hz, self.line_hz, "declared", False, None, rows,
                   float(p.sum()), math.sqrt(max(var_t, 0.0)), stand)

    def powers(self) -> np.ndarray:
        """Mean corrected power per harmonic (not clipped), squared input units."""
        return np.array([r[2] for r in self.result().harmonics])
