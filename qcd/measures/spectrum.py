"""Spectral measures: streaming Welch PSD from one rfft per block, bands, corner, aliasing,
narrow lines and the compact display spectrum (mains hum: qcd.measures.mains). numpy only, SI
in and out.

Every block of L samples is transformed once (``block_fft``); the linear detrend, the Hann
window of Welch's method and the band RMS values are all derived from that one transform.
"""
from __future__ import annotations

import functools
import heapq
import math
import sys
from typing import Any, Callable

import numpy as np

from qcd.measures.noise import median

__all__ = ["block_fft", "BlockFFT", "hann_psd", "WelchAccumulator", "mains_mask", "band_rms",
           "BANDS", "corner_hz", "alias_ratio_db", "ALIAS_LIMIT_DB", "line_threshold",
           "spectral_lines", "compact_spectrum"]

# Fixed reporting bands (Hz): measure name -> (low, high). 'corner' is the file's corner_hz.
BANDS: dict[str, tuple[float, float | str]] = {
    "band_rms_0p5_10": (0.5, 10.0),      # drift, perfusion
    "band_rms_10_70": (10.0, 70.0),      # mechanical
    "band_rms_70_1k": (70.0, 1000.0),
    "band_rms_1k_corner": (1000.0, "corner"),   # headstage, pipette
}

ALIAS_LIMIT_DB = -6.0        # METHODS §5: flag R > -6 dB (common practice)
GRID_DEVIATION_HZ = 0.2      # half-width allowance per harmonic number (METHODS §4.1, ±200 mHz)
SEARCH_DEVIATION = 0.015     # f0 searched within ±1.5 % of nominal (EN 50160 ±1 % plus margin)


def _centred(n: int) -> np.ndarray:
    return np.arange(n, dtype=float) - (n - 1) / 2.0


def block_fft(blocks: np.ndarray, *, overwrite: bool = False
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """rfft of each row after removing its least-squares line: one transform per row.

    Parameters
    ----------
    blocks : (n, L) float64 array. With ``overwrite`` the rows are detrended in place (saves
        a copy on the streaming path).

    Returns
    -------
    X : (n, L//2+1) complex, the DFT of each detrended row (X[:, 0] == 0).
    mean : (n,) row means.  slope : (n,) least-squares slope per sample.
    """
    blocks = np.atleast_2d(np.asarray(blocks, dtype=float))
    if not overwrite:
        blocks = blocks.copy()
    n = blocks.shape[1]
    c = _centred(n)
    ss = float(c @ c)
    slope = np.einsum("bj,j->b", blocks, c) / ss if ss > 0 else np.zeros(blocks.shape[0])
    # the line's centred part only: the mean stays and leaves through the DC bin
    blocks -= np.multiply.outer(slope, c)
    X = np.fft.rfft(blocks, axis=1)
    mean = X[:, 0].real / n
    X[:, 0] = 0.0
    return X, mean, slope


class BlockFFT:
    """``block_fft`` with reused work buffers, for the streaming path.

    Fresh multi-megabyte arrays per chunk cost page faults that outweigh the arithmetic, so
    the trend and spectrum buffers are kept between calls. The returned X is overwritten by
    the next call. ``shared``: a dict of buffers shared with other BlockFFTs used one after
    the other in one thread (the channels of one file): one set of buffers stays in cache
    where one set per channel would be evicted between a channel's calls (measured on 16
    channels: 10 % of the analysis time). The returned X is then overwritten by the next
    call of any of them.
    """

    def __init__(self, n: int, *, single: bool = False,
                 shared: dict[tuple[str, int, str], np.ndarray] | None = None) -> None:
        self.n = n
        self.c = _centred(n)
        self.ss = float(self.c @ self.c)
        self._pool: dict[tuple[str, int, str], np.ndarray] = {} if shared is None else shared
        self.detrended: np.ndarray | None = None
        self.top: np.ndarray | None = None     # each detrended row's maximum and minimum
        self.bottom: np.ndarray | None = None
        self._rfft32 = _single_rfft() if single else None
        self.single = self._rfft32 is not None
        self._c32 = self.c.astype(np.float32)
        self.base: np.ndarray | None = None   # the offset taken off each row before (single)

    def _buffer(self, name: str, rows: int, width: int, dtype: Any) -> np.ndarray:
        """A (rows, width) work array, grown when a call needs more rows."""
        key = (name, width, np.dtype(dtype).str)
        a = self._pool.get(key)
        if a is None or a.shape[0] < rows:
            a = self._pool[key] = np.empty((rows, width), dtype=dtype)
        return a[:rows]

    def __call__(self, blocks: np.ndarray, offset: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(X, mean, slope) as block_fft for (n_blocks, L) ``blocks``.

        float64 blocks are detrended in place; other dtypes (raw int16 converter counts) are
        converted into a reused buffer first. Made with ``single`` (and scipy.fft at hand),
        integer blocks are transformed in float32 (``_single``): ``offset`` (one integer per
        row, e.g. its median) is taken off first, so the float32 samples are exact and small.
        """
        if self._rfft32 is not None and blocks.dtype.kind in "iu":
            return self._single(blocks, offset)
        nb = blocks.shape[0]
        X = self._buffer("X", nb, self.n // 2 + 1, complex)
        if (blocks.dtype != np.float64 or not blocks.flags.writeable
                or not blocks.flags.c_contiguous):
            work = self._buffer("work", nb, self.n, np.float64)
            work[...] = blocks
            blocks = work
        slope = (np.einsum("bj,j->b", blocks, self.c) / self.ss if self.ss > 0
                 else np.zeros(nb))
        self.top, self.bottom = _take_lines(blocks, slope, self.c,
                                            self._buffer("line", 1, self.n, np.float64)[0])
        self.detrended = blocks            # the residual rows, until the next call
        self.base = None
        np.fft.rfft(blocks, axis=1, out=X)
        mean = X[:, 0].real / self.n
        X[:, 0] = 0.0
        return X, mean, slope

    def _single(self, blocks: np.ndarray, offset: np.ndarray | None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The float32 path for integer samples (16-bit converter counts are exact in float32;
        with the row's offset taken off, so are the differences): half the memory traffic of
        float64 and a single-precision transform. X is complex64; mean and slope float64."""
        nb = blocks.shape[0]
        work = self._buffer("work", nb, self.n, np.float32)
        off = np.zeros(nb) if offset is None else np.rint(np.asarray(offset, dtype=float))
        # converted and the offset taken off in one pass (exact: integers below 2^24)
        np.subtract(blocks, off.astype(np.float32)[:, None], out=work, dtype=np.float32)
        # float32 sums (a fifth of the time of float64 ones): the slope's rounding, ~1e-7 of
        # its terms, moves the residual's variance by far less than that (einsum, not a BLAS
        # product: a threaded BLAS spins its threads and costs more CPU than it saves)
        slope = (np.einsum("bj,j->b", work, self._c32).astype(np.float64) / self.ss
                 if self.ss > 0 else np.zeros(nb))
        self.top, self.bottom = _take_lines(work, slope.astype(np.float32), self._c32,
                                            self._buffer("line", 1, self.n, np.float32)[0])
        self.detrended = work
        self.base = off
        # into a reused buffer: no page faults
        X = self._rfft32(work, self._buffer("X", nb, self.n // 2 + 1, np.complex64))
        mean = X[:, 0].real.astype(np.float64) / self.n + off
        X[:, 0] = 0.0
        return X, mean, slope


def _take_lines(rows: np.ndarray, slope: np.ndarray, c: np.ndarray, line: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """rows -= outer(slope, c), one row at a time through the cache-sized buffer ``line``
    (the same arithmetic as the outer product; half the time of writing it out whole); the
    (max, min) of each detrended row, taken while the row is still in cache."""
    n = rows.shape[0]
    top = np.empty(n, dtype=rows.dtype)
    bottom = np.empty(n, dtype=rows.dtype)
    for i in range(n):
        r = rows[i]
        np.multiply(c, slope[i], out=line)
        r -= line
        top[i] = r.max()
        bottom[i] = r.min()
    return top, bottom


@functools.cache
def _single_rfft():
    """An rfft along rows that keeps float32 as complex64 (numpy's transform is about 3x
    slower in float32, measured), or None without scipy: ``f(x, out)`` writes into ``out``
    (rows x.shape[0], complex64) where it can and returns the result.

    scipy.fft's own compiled transform (``pypocketfft.r2c``, what ``scipy.fft.rfft`` calls) is
    loaded straight from its file: importing the scipy.fft package brings scipy.special along
    (about 0.2 s), more than the transform saves on a file of a few minutes. It is checked
    against numpy's rfft once; anything unexpected falls back to the public scipy.fft.rfft.
    Found once per process (each channel of each file asks).
    """
    try:
        r2c = _pocketfft_r2c()
        probe = np.sin(np.arange(24.0) ** 1.5).reshape(2, 12).astype(np.float32)
        out = np.empty((2, 7), dtype=np.complex64)
        got = r2c(probe, out)
        # the DFT by its definition (numpy.fft is not loaded on the float32 path otherwise)
        jk = np.outer(np.arange(12), np.arange(7))
        want = probe.astype(np.float64) @ np.exp(-2j * np.pi * jk / 12)
        if np.shares_memory(got, out) and np.allclose(got, want, atol=1e-5):
            return r2c
    except Exception:                      # noqa: BLE001 - any surprise: the public path
        pass
    try:
        import scipy.fft
    except ImportError:                    # pragma: no cover - scipy is a dependency
        return None
    return lambda x, out=None: scipy.fft.rfft(x, axis=1)


def _pocketfft_r2c():
    import importlib.machinery
    import importlib.util
    import os

    name = "scipy.fft._pocketfft.pypocketfft"
    mod = sys.modules.get(name)
    if mod is None:
        # scipy's folder from its import spec: importing the scipy package itself costs
        # 3-4 ms of a scan's start-up (measured) and the transform does not need it
        spec = importlib.util.find_spec("scipy")
        if spec is None or not spec.submodule_search_locations:
            raise ImportError("scipy not found")
        folder = os.path.join(spec.submodule_search_locations[0], "fft", "_pocketfft")
        path = next(os.path.join(folder, f) for f in sorted(os.listdir(folder))
                    if f.startswith("pypocketfft")
                    and f.endswith(tuple(importlib.machinery.EXTENSION_SUFFIXES)))
        spec = importlib.util.spec_from_file_location(name, path)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
    fn = mod.r2c
    # forward, no scaling, the given output, one thread
    return lambda x, out=None: fn(x, (1,), True, 0, out, 1)


def _one_sided_weights(n: int) -> np.ndarray:
    """Parseval weights of rfft bins: 1 for DC (and Nyquist when n is even), 2 elsewhere."""
    w = np.full(n // 2 + 1, 2.0)
    w[0] = 1.0
    if n % 2 == 0:
        w[-1] = 1.0
    return w


def _hann_s2(n: int) -> float:
    return float(np.sum((0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)) ** 2))


def _hann_edges(X: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """|Xw|^2 at bin 0 and at the last bin of each row (their neighbours wrap around)."""
    first = 0.5 * X[:, 0] - 0.25 * (np.conj(X[:, 1]) + X[:, 1])
    if n % 2 == 0:
        last = 0.5 * X[:, -1] - 0.25 * (X[:, -2] + np.conj(X[:, -2]))
    else:
        last = 0.5 * X[:, -1] - 0.25 * (X[:, -2] + np.conj(X[:, -1]))
    return np.abs(first) ** 2, np.abs(last) ** 2


def hann_psd(X: np.ndarray, n: int, fs: float) -> np.ndarray:
    """One-sided density periodogram (unit**2/Hz) of each row with a periodic Hann window.

    The window is applied in the frequency domain: the periodic Hann w = 0.5 - 0.5 cos(2 pi m/L)
    turns the DFT into 0.5 X[k] - 0.25 X[k-1] - 0.25 X[k+1] (exact; the neighbours beyond the
    rfft half come from the conjugate symmetry of a real signal). This equals scipy.signal.welch
    (window='hann', detrend='linear', noverlap=0) segment by segment [S Welch 1967].
    """
    X = np.atleast_2d(X)
    Xw = 0.5 * X
    Xw[:, 1:-1] -= 0.25 * (X[:, :-2] + X[:, 2:])
    P = Xw.real ** 2 + Xw.imag ** 2
    P[:, 0], P[:, -1] = _hann_edges(X, n)
    P *= _one_sided_weights(n)[None, :] / (fs * _hann_s2(n))
    return P


class WelchAccumulator:
    """Streaming Welch sum from detrended block spectra, without windowing each block.

    For the periodic Hann window, sum_b |Xw_bk|^2 = 0.25 A_k + (A_{k-1} + A_{k+1} +
    2 D2_{k-1})/16 - (D1_{k-1} + D1_k)/4, with A_k = sum_b |X_bk|^2 and D_m the real part of
    the lag-m cross products sum_b X_bk conj(X_b,k+m) (expanding |0.5 X_k - 0.25 (X_{k-1} +
    X_{k+1})|^2; derived). So a block costs three fused multiply-add passes, not a second
    FFT or windowed copy. The loudest ``keep`` blocks (by ``rms``) are kept so that event blocks
    can be taken out exactly at the end (``psd(exclude)``; ``exact`` says whether all were).
    ``keep_bytes=0`` keeps none: then ``psd`` is given the excluded blocks' spectra again by a
    caller that can read them back (a gap-free file), which saves copying the loudest blocks
    while they stream past.
    """

    def __init__(self, n: int, fs: float, keep_bytes: int = 40_000_000) -> None:
        m = n // 2 + 1
        self.n, self.fs, self.m = n, fs, m
        self.A = np.zeros(m)
        self.D1 = np.zeros(max(m - 1, 0))
        self.D2 = np.zeros(max(m - 2, 0))
        self.e0 = 0.0
        self.eN = 0.0
        self.count = 0
        self.keep = (int(min(4096, max(16, keep_bytes // (16 * max(m, 1)))))
                     if keep_bytes > 0 else 0)
        self._heap: list[tuple[float, int, int]] = []      # (rms, block index, slot)
        self._rows: np.ndarray | None = None               # kept spectra, one slot each
        self.exact = True

    def add(self, X: np.ndarray, rms: np.ndarray) -> None:
        X = np.ascontiguousarray(np.atleast_2d(X))
        Y = X.view(X.real.dtype)           # float64, or float32 from the single path
        s = np.einsum("bj,bj->j", Y, Y)
        self.A += s[0::2] + s[1::2]
        if self.m > 1:
            s = np.einsum("bj,bj->j", Y[:, :-2], Y[:, 2:])
            self.D1 += s[0::2] + s[1::2]
        if self.m > 2:
            s = np.einsum("bj,bj->j", Y[:, :-4], Y[:, 4:])
            self.D2 += s[0::2] + s[1::2]
        e0, eN = _hann_edges(X, self.n)
        self.e0 += float(e0.sum())
        self.eN += float(eN.sum())
        if not self.keep:
            self.count += X.shape[0]
            return
        if self._rows is None:             # kept as transformed (complex64 on the single
            self._rows = np.empty((self.keep, self.m), dtype=X.dtype)    # path: no widening)
        elif self._rows.dtype != X.dtype:
            self._rows = self._rows.astype(np.result_type(self._rows, X))
        heap = self._heap
        rows = X.shape[0]
        first = min(rows, max(self.keep - len(heap), 0))       # rows that fill free slots
        for i in range(first):
            slot = len(heap)
            heapq.heappush(heap, (float(rms[i]), self.count + i, slot))
            self._rows[slot] = X[i]
        # the slots are full: a row at or below the smallest kept RMS is never kept (that
        # minimum only rises), so only the rows above it are looked at one by one
        later = np.flatnonzero(np.asarray(rms[first:rows], dtype=float) > heap[0][0]) + first \
            if rows > first else ()
        for i in later:
            r = float(rms[i])
            if r > heap[0][0]:
                slot = heap[0][2]
                heapq.heapreplace(heap, (r, self.count + int(i), slot))
                self._rows[slot] = X[i]
        self.count += X.shape[0]

    def _total(self) -> np.ndarray:
        A, D1, D2 = self.A, self.D1, self.D2
        P = np.empty(self.m)
        P[1:-1] = (0.25 * A[1:-1] + 0.0625 * (A[:-2] + A[2:] + 2 * D2)
                   - 0.25 * (D1[:-1] + D1[1:]))
        P[0], P[-1] = self.e0, self.eN
        return P * (_one_sided_weights(self.n) / (self.fs * _hann_s2(self.n)))

    def psd(self, exclude: frozenset[int] | set[int] = frozenset(),
            spectra: Callable[[np.ndarray], np.ndarray] | None = None
            ) -> tuple[np.ndarray, int]:
        """(mean periodogram without the excluded blocks, number of blocks averaged).

        ``spectra(indices)``: the rfft rows of those blocks (as ``add`` got them), asked for
        the excluded blocks that were not kept, at most 64 at a time."""
        total = self._total()
        n = self.count
        kept = {idx: self._rows[slot] for _, idx, slot in self._heap}
        gone = sorted(i for i in exclude if 0 <= i < self.count)
        missing = [i for i in gone if i not in kept]
        self.exact = not missing or spectra is not None
        for i in gone:
            if i in kept:
                total -= hann_psd(kept[i][None, :].astype(complex), self.n, self.fs)[0]
                n -= 1
        if spectra is not None:
            for a in range(0, len(missing), 64):
                part = np.asarray(missing[a:a + 64], dtype=np.int64)
                X = np.asarray(spectra(part)).astype(complex)
                total -= hann_psd(X, self.n, self.fs).sum(axis=0)
                n -= len(part)
        if n <= 0:
            return np.maximum(self._total() / max(self.count, 1), 0.0), self.count
        return np.maximum(total / n, 0.0), n


def _floor_correction(k_segments: int) -> float:
    """Median over mean of a K-segment average of chi-square(2) bins: the Gamma(K, 1/K)
    median, by the asymptotic series K - 1/3 + 8/(405 K) + 184/(25515 K^2) (Choi 1994, cited from memory),
    within 0.1 % of scipy.special.gammaincinv(K, 0.5) from K = 1 on."""
    k = float(max(int(k_segments), 1))
    return (k - 1.0 / 3.0 + 8.0 / (405.0 * k) + 184.0 / (25515.0 * k * k)) / k


def mains_mask(freqs: np.ndarray, f0: float | None, top_hz: float) -> np.ndarray:
    """True on bins within W_h of a harmonic of f0 (up to top_hz)."""
    mask = np.zeros(len(freqs), dtype=bool)
    if not f0:
        return mask
    df = float(freqs[1] - freqs[0])
    h = 1
    while h * f0 <= top_hz + 3 * df:
        mask |= np.abs(freqs - h * f0) <= max(3 * df, h * GRID_DEVIATION_HZ)
        h += 1
    return mask


def band_rms(freqs: np.ndarray, psd: np.ndarray, lo: float, hi: float,
             line_hz: float | None = None) -> float | None:
    """RMS in [lo, hi] Hz from a density PSD, mains bins taken out (METHODS §3.2, common
    practice). Removed bins count at the band's median density of the kept bins, so the value
    stays the broadband level over the whole band. None when the band holds no bin."""
    sel = (freqs >= lo - 1e-9) & (freqs <= hi + 1e-9) & (freqs > 0)
    if not sel.any():
        return None
    df = float(freqs[1] - freqs[0])
    mask = mains_mask(freqs, line_hz, hi) & sel
    kept = sel & ~mask
    if not kept.any():
        return None
    power = float(np.sum(psd[kept]) * df + mask.sum() * median(psd[kept]) * df)
    return math.sqrt(max(power, 0.0))


def _smooth(psd: np.ndarray, width: int) -> np.ndarray:
    """Running mean over ``width`` bins (odd), edges padded with the end values."""
    width = max(1, int(width) | 1)
    h = width // 2
    padded = np.concatenate((np.full(h, psd[0]), psd, np.full(h, psd[-1])))
    c = np.concatenate(([0.0], np.cumsum(padded)))
    return (c[width:] - c[:-width]) / width


def _running_median(x: np.ndarray, width: int) -> np.ndarray:
    """Running median over ``width`` bins (odd), edges padded with the end values."""
    h = width // 2
    padded = np.concatenate((np.full(h, x[0]), x, np.full(h, x[-1])))
    view = np.lib.stride_tricks.sliding_window_view(padded, width)
    if width % 2:                    # the middle element: numpy.median's value, less overhead
        return np.partition(view, h, axis=1)[:, h].astype(float)
    return median(view, axis=1)


def alias_ratio_db(freqs: np.ndarray, psd: np.ndarray) -> float | None:
    """R = median PSD(0.80-0.95 f_N) / median PSD(0.02-0.10 f_N) in dB (METHODS §5)."""
    fn = float(freqs[-1])
    hi = psd[(freqs >= 0.80 * fn) & (freqs <= 0.95 * fn)]
    lo = psd[(freqs >= 0.02 * fn) & (freqs <= 0.10 * fn)]
    if len(hi) < 3 or len(lo) < 3:
        return None
    mh, ml = float(median(hi)), float(median(lo))
    if ml <= 0 or mh <= 0:
        return None
    return 10 * math.log10(mh / ml)


def corner_hz(freqs: np.ndarray, psd: np.ndarray, k_segments: int = 1) -> float | None:
    """The -3 dB corner of the noise spectrum (METHODS §5).

    The PSD is smoothed by a running mean over max(9 bins, 2 % of f_N, 100/K bins) (wider
    than the 9 bins of METHODS so that the first crossing is not a noise dip at 1 Hz
    resolution; K segments averaged); the plateau is its median over
    0.02-0.10 f_N; the corner is the first frequency above 0.10 f_N where it falls 3 dB below
    the plateau, interpolated linearly in dB between bins. None when it never falls (flat to
    Nyquist).
    """
    fn = float(freqs[-1])
    df = float(freqs[1] - freqs[0])
    width = max(9, int(0.02 * fn / df), int(math.ceil(100.0 / max(k_segments, 1))))
    sm = _smooth(psd, width)
    lo = sm[(freqs >= 0.02 * fn) & (freqs <= 0.10 * fn)]
    if len(lo) < 3:
        return None
    plateau = float(median(lo))
    if plateau <= 0:
        return None
    target = plateau / 10 ** 0.3
    start = int(np.searchsorted(freqs, 0.10 * fn))
    stop = len(freqs) - max(1, width // 2)
    below = np.flatnonzero(sm[start:stop] < target)
    if not len(below):
        return None
    i = start + int(below[0])
    if i == 0:
        return float(freqs[0])
    y0, y1 = 10 * np.log10(max(sm[i - 1], 1e-300)), 10 * np.log10(max(sm[i], 1e-300))
    yt = 10 * math.log10(target)
    # The bin before the first crossing can itself lie below the target when the crossing
    # is at the start of the search (0.10 f_N): never extrapolate outside the bin pair.
    frac = 0.0 if y0 == y1 else min(max((y0 - yt) / (y0 - y1), 0.0), 1.0)
    return float(freqs[i - 1] + frac * (freqs[i] - freqs[i - 1]))


def line_threshold(k_segments: int) -> float:
    """How far (as a factor) a narrow line's peak bin must stand above the local floor of a
    K-segment average: max(3, 1 + 20/K**0.75) (common practice; noise alone passes it with a
    chance of about 1e-9 per bin). Shared by spectral_lines and the mains line search."""
    return max(3.0, 1.0 + 20.0 / max(k_segments, 1) ** 0.75)


def spectral_lines(freqs: np.ndarray, psd: np.ndarray, *, k_segments: int = 1,
                   line_hz: float | None = None, n_max: int = 5,
                   min_hz: float = 20.0) -> list[tuple[float, float]]:
    """Strongest narrow peaks that are not mains harmonics: [(freq_hz, rms)], loudest first.

    A line is a local maximum standing above the running median of +-25 bins by
    ``line_threshold(K)`` (so a K-segment average seldom passes by chance; common practice),
    between min_hz and 0.9 f_N, not within W_h of a harmonic of line_hz (up to 2 kHz). Its RMS
    is the floor-corrected power of the peak bin and two neighbours each side.
    """
    if len(psd) < 60:
        return []
    df = float(freqs[1] - freqs[0])
    local = _running_median(psd, 51) / _floor_correction(k_segments)
    thr = line_threshold(k_segments)
    ok = (freqs >= min_hz) & (freqs <= 0.9 * freqs[-1]) & (local > 0)
    ok &= ~mains_mask(freqs, line_hz, 2000.0)
    peak = np.zeros(len(psd), dtype=bool)
    peak[1:-1] = (psd[1:-1] >= psd[:-2]) & (psd[1:-1] >= psd[2:])
    cand = np.flatnonzero(ok & peak & (psd > thr * local))
    found = []
    for k in cand:
        lo, hi = max(0, k - 2), min(len(psd), k + 3)
        p = float(np.sum(psd[lo:hi] - local[k]) * df)
        if p > 0:
            found.append((float(freqs[k]), math.sqrt(p)))
    found.sort(key=lambda t: -t[1])
    chosen: list[tuple[float, float]] = []
    for f, r in found:          # one entry per peak: drop neighbours within 3 bins
        if all(abs(f - g) > 3 * df for g, _ in chosen):
            chosen.append((f, r))
        if len(chosen) >= n_max:
            break
    return chosen


def compact_spectrum(freqs: np.ndarray, psd: np.ndarray, n_points: int = 200
                     ) -> tuple[np.ndarray, np.ndarray]:
    """~n_points log-spaced (frequency, mean density) pairs from df to f_N, for storage/plots."""
    f = freqs[1:]
    p = psd[1:]
    if len(f) <= n_points:
        return f.copy(), p.copy()
    edges = np.geomspace(f[0], f[-1] * (1 + 1e-12), n_points + 1)
    idx = np.clip(np.searchsorted(edges, f, side="right") - 1, 0, n_points - 1)
    counts = np.bincount(idx, minlength=n_points)
    sums = np.bincount(idx, weights=p, minlength=n_points)
    fsum = np.bincount(idx, weights=f, minlength=n_points)
    keep = counts > 0
    return fsum[keep] / counts[keep], sums[keep] / counts[keep]
