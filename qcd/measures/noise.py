"""Noise measures per baseline window: SD and band SD from the window's one rfft
(``spectrum.block_fft``), time-domain references, clipping and event blocks. numpy only.
"""
from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["median", "parseval_sd", "peak_to_peak", "rms", "detrended_sd", "lowpass_sd",
           "clipping_count", "EVENT_FACTOR", "event_blocks", "MAD_SCALE"]

EVENT_FACTOR = 3.0    # a block with RMS above 3x the median block RMS holds an event (DESIGN)

# 1/Phi^-1(0.75): median absolute deviation -> SD for normal data (Rousseeuw & Croux 1993;
# docs/methods.md §7). The one robust-scale constant of qcd.
MAD_SCALE = 1.482602218505602


def median(a: Any, axis: int | None = None) -> Any:
    """numpy.median's value over all values or along one axis: the same partition, the mean
    of the middle value (pair) and NaN where the data hold one. numpy.median also asks
    whether its result is a masked array, which imports numpy.ma on first use: 20-40 ms of a
    scan's start-up (measured), for a check that never applies here."""
    a = np.asanyarray(a)
    if axis is None:
        a, axis = a.ravel(), 0
    sz = a.shape[axis]
    if sz == 0:
        return np.median(a, axis=axis)          # numpy's own warning and NaN
    kth = [sz // 2 - 1, sz // 2] if sz % 2 == 0 else [(sz - 1) // 2]
    nans = np.issubdtype(a.dtype, np.inexact)
    if nans:
        kth.append(-1)                          # NaNs sort last
    part = np.partition(a, kth, axis=axis)
    half = sz // 2
    index: list[slice] = [slice(None)] * part.ndim
    index[axis] = slice(half, half + 1) if sz % 2 else slice(half - 1, half + 1)
    out = np.mean(part[tuple(index)], axis=axis)
    if nans:
        last = part.take(-1, axis=axis)
        bad = np.isnan(last)
        if bad.any():
            if isinstance(out, np.generic):
                return last
            out[bad] = last[bad]
    return out


def parseval_sd(X: np.ndarray, n: int, fs: float, band_hz: float = 1000.0
                ) -> tuple[np.ndarray, np.ndarray]:
    """(SD, SD below band_hz) of each detrended block from its rfft ``X`` (rows).

    Parseval: sum |x_d|^2 = (1/L) sum_k w_k |X_k|^2 with w the one-sided weights, so
    sd = sqrt(sum_k w_k |X_k|^2) / L (population SD of the residual of the least-squares line).
    The band value sums bins f_k <= band_hz only: exactly the SD of the detrended block after an
    ideal zero-phase (brick-wall) low-pass at band_hz, i.e. ``irfft`` with the higher bins set
    to zero (tested against that time-domain filter). Used for noise_rms and noise_rms_1k.
    """
    X = np.ascontiguousarray(np.atleast_2d(X))
    Y = X.view(X.real.dtype)               # float64, or float32 from the single path
    m = X.shape[1]
    last = (np.abs(X[:, -1]).astype(float) ** 2) if n % 2 == 0 else 0.0
    first = np.abs(X[:, 0]).astype(float) ** 2
    nb = int(min(m, np.floor(band_hz * n / fs + 1e-9) + 1))
    # float32 spectra (the single path) are summed in float32 too: about 1e-6 relative over
    # 1e4 bins (measured), far below what a noise value is read to, at a third of the time of
    # squaring into a buffer for pairwise sums
    total = 2 * np.einsum("bj,bj->b", Y, Y).astype(float) - first - last
    part = 2 * np.einsum("bj,bj->b", Y[:, :2 * nb], Y[:, :2 * nb]).astype(float) - first
    if nb == m:
        part = part - last
    return np.sqrt(np.maximum(total, 0.0)) / n, np.sqrt(np.maximum(part, 0.0)) / n


def peak_to_peak(blocks: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(max - min, max, min) of each row (docs/methods.md §3.3). noise_pp takes it of the
    detrended window (the residual of the least-squares line, as noise_rms), so drift does not
    count."""
    blocks = np.atleast_2d(blocks)
    mx = blocks.max(axis=1).astype(float)      # integer samples: no overflow in max - min
    mn = blocks.min(axis=1).astype(float)
    return mx - mn, mx, mn


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
    return sd > factor * float(median(sd))
