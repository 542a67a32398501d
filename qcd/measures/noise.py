"""Time-domain noise measures per baseline window, computed from the window's one rfft
(``spectrum.block_fft``) plus a few vectorised passes. numpy only, SI in and out.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qcd.measures.spectrum import _one_sided_weights

__all__ = ["BlockNoise", "block_noise", "rms", "detrended_sd", "lowpass_sd",
           "clipping_count", "EVENT_FACTOR", "event_blocks"]

EVENT_FACTOR = 3.0    # a block with RMS above 3x the median block RMS holds an event (DESIGN)


@dataclass(frozen=True)
class BlockNoise:
    """Per-block values (arrays of one entry per block), SI units."""
    sd: np.ndarray        # SD after removing the least-squares line (noise_rms)
    sd_band: np.ndarray   # the same after a zero-phase brick-wall low-pass at band_hz (noise_rms_1k)
    pp: np.ndarray        # peak-to-peak of the detrended block (noise_pp)
    mean: np.ndarray      # block mean (holding)
    median: np.ndarray    # block median (baseline_drift)


def block_noise(blocks: np.ndarray, X: np.ndarray, slope: np.ndarray, mean: np.ndarray,
                fs: float, band_hz: float = 1000.0, medians: bool = True) -> BlockNoise:
    """Noise values of each row of ``blocks`` from its detrended rfft ``X``.

    sd: by Parseval, sum |x_d|^2 = (1/L) sum_k w_k |X_k|^2 with w the one-sided weights, so
    sd = sqrt(sum_k w_k |X_k|^2) / L (population SD of the residual; Parseval's theorem).
    sd_band: the same sum over bins f_k <= band_hz: exactly the SD of the signal after an ideal
    zero-phase (brick-wall) low-pass at band_hz applied to the detrended block, i.e.
    ``irfft`` with the higher bins set to zero (tested against that time-domain filter).
    pp: max - min of the block with its line removed (METHODS §3.3).
    """
    n = blocks.shape[1]
    w = _one_sided_weights(n)
    power = X.real ** 2 + X.imag ** 2
    power *= w[None, :]
    freqs = np.arange(X.shape[1]) * fs / n
    sd = np.sqrt(power.sum(axis=1)) / n
    nb = int(np.searchsorted(freqs, band_hz * (1 + 1e-12), side="right"))
    sd_band = np.sqrt(power[:, :nb].sum(axis=1)) / n
    centred = np.arange(n, dtype=float) - (n - 1) / 2.0
    resid = blocks - slope[:, None] * centred[None, :]
    pp = resid.max(axis=1) - resid.min(axis=1)
    med = np.median(blocks, axis=1) if medians else mean
    return BlockNoise(sd, sd_band, pp, mean, med)


def rms(x: np.ndarray) -> float:
    """Root mean square. A sine of amplitude A has RMS A/sqrt(2) (analytic)."""
    x = np.asarray(x, dtype=float)
    return float(np.sqrt(np.mean(x * x)))


def detrended_sd(x: np.ndarray) -> float:
    """Time-domain reference: RMS of x after removing its least-squares line."""
    x = np.asarray(x, dtype=float)
    t = np.arange(len(x), dtype=float)
    a, b = np.polyfit(t, x, 1)
    return rms(x - (a * t + b))


def lowpass_sd(x: np.ndarray, fs: float, band_hz: float = 1000.0) -> float:
    """Time-domain reference: SD of the detrended x after a zero-phase brick-wall low-pass."""
    x = np.asarray(x, dtype=float)
    t = np.arange(len(x), dtype=float)
    a, b = np.polyfit(t, x, 1)
    X = np.fft.rfft(x - (a * t + b))
    X[np.fft.rfftfreq(len(x), 1 / fs) > band_hz] = 0
    return rms(np.fft.irfft(X, n=len(x)))


def clipping_count(x: np.ndarray, rails: tuple[float, float] | None) -> int:
    """Samples at or beyond the converter rails (lo, hi), same unit as x."""
    if rails is None:
        return 0
    lo, hi = rails
    if len(x) == 0:
        return 0
    if x.max() < hi and x.min() > lo:      # cheap common case: two reductions
        return 0
    return int(np.count_nonzero(x >= hi) + np.count_nonzero(x <= lo))


def event_blocks(sd: np.ndarray, factor: float = EVENT_FACTOR) -> np.ndarray:
    """Boolean mask of blocks whose RMS exceeds factor x the median block RMS (DESIGN)."""
    sd = np.asarray(sd, dtype=float)
    if len(sd) < 3:
        return np.zeros(len(sd), dtype=bool)
    return sd > factor * float(np.median(sd))
