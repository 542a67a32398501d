"""The phase-coherent zoom: each baseline block's Hann-windowed spectrum at any frequency near
the first mains harmonics, from the block's DFT bins, summed over contiguous blocks with the
phase a steady line would have. numpy only, SI in and out; imports qcd.measures.mains and
qcd.measures.spectrum (search widths).
"""
from __future__ import annotations

import math

import numpy as np

from qcd.measures.mains import DETECT_HARMONICS
from qcd.measures.spectrum import SEARCH_DEVIATION

__all__ = ["LineBins"]

_HALO = 4                # bins each side of a frequency used to evaluate its Hann-windowed DTFT
_RUN_BLOCKS = 16         # blocks summed with their phase (about 16 s at 1 s blocks): longer
                         # stretches would smear the line as the grid frequency wanders


def _hann_kernel(u: np.ndarray, n: int) -> np.ndarray:
    """(1/n) sum_m w_m exp(-i 2 pi u m / n) for the periodic Hann window w, u in bins.

    The sum of the three shifted Dirichlet kernels 0.5 D(u) - 0.25 D(u-1) - 0.25 D(u+1),
    D(u) = exp(-i pi u (n-1)/n) sin(pi u) / (n sin(pi u/n)), with their common factors taken
    out; whole-bin u (removable singularities) is nudged by 1e-9 bin."""
    u = np.asarray(u, dtype=float)
    u = np.where(np.abs(u - np.rint(u)) < 1e-9, u + 1e-9, u)
    a = np.pi / n
    bracket = (0.5 / np.sin(a * u) - 0.25 * np.exp(-1j * a) / np.sin(a * (u - 1))
               - 0.25 * np.exp(1j * a) / np.sin(a * (u + 1)))
    return np.exp(-1j * a * u * (n - 1)) * np.sin(np.pi * u) / n * bracket


class LineBins:
    """The complex DFT bins of each baseline block around the first mains harmonics.

    From them the Hann-windowed spectrum of every block is evaluated at any frequency near a
    harmonic (Y_b(nu) = sum_k X_bk G(nu - k), G the window's DTFT; exact up to the few bins
    left out, whose weight falls as 1/distance^3), and the blocks of one continuous stretch are
    summed with the phase a steady line would have at their start times: a line then adds up
    coherently over up to 16 blocks while noise adds in power, which pins the frequency far
    below one bin (common practice; the zoom is the periodogram of the longer stretch). Blocks
    of different sweeps, whose relative timing the header may not give exactly, are added in
    power only. Keeps the first ``keep`` blocks: with 64 s of a line that stands out, the
    frequency is already known to a few mHz.
    """

    def __init__(self, n: int, fs: float, nominals: tuple[float, ...] = (50.0, 60.0),
                 n_harm: int = DETECT_HARMONICS, keep: int = 64, scale: float = 1.0) -> None:
        self.n, self.fs = n, fs
        self.df = fs / n
        self.scale2 = scale * scale
        bins: set[int] = set()
        for F in nominals:
            for h in range(1, n_harm + 1):
                c = h * F
                half = c * SEARCH_DEVIATION + self.df
                lo = int(math.floor((c - half) / self.df)) - _HALO - 2
                hi = int(math.ceil((c + half) / self.df)) + _HALO + 2
                bins.update(k for k in range(max(lo, 1), min(hi, n // 2) + 1))
        self.bins = np.array(sorted(bins), dtype=int)
        self._pos = {int(k): i for i, k in enumerate(self.bins)}
        self.keep = keep
        self._rows: list[np.ndarray] = []
        self._start: list[int] = []
        self._run: list[tuple[int, int]] = []
        self._first: dict[int, int] = {}
        self.count = 0                 # blocks kept
        self.seen = 0                  # blocks offered (their index is the Welch block index)
        self._excluded: frozenset[int] = frozenset()
        self._cache: tuple | None = None
        self._s2 = float(np.sum((0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)) ** 2))

    def add(self, X: np.ndarray, starts: np.ndarray, run: int) -> None:
        """Blocks' rfft rows with their first sample's index on the stretch ``run``."""
        m = X.shape[0]
        take = min(m, self.keep - self.count)
        if take > 0 and len(self.bins):
            self._rows.append(X[:take, self.bins].copy())
            first = self._first.setdefault(run, int(starts[0]))
            for s in starts[:take]:
                s = int(s)
                self._start.append(s)
                self._run.append((run, (s - first) // (_RUN_BLOCKS * self.n)))
            self.count += take
            self._cache = None
        self.seen += m

    def exclude(self, blocks: frozenset[int] | set[int]) -> None:
        """Leave these blocks (Welch block indices, e.g. event blocks) out."""
        self._excluded = frozenset(blocks)
        self._cache = None

    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
        """(bins of the kept blocks, their start times in s, stretch index, stretches)."""
        if self._cache is None:
            keep = np.array([i not in self._excluded for i in range(self.count)], dtype=bool)
            X = np.concatenate(self._rows)[keep] if self._rows else np.zeros((0, len(self.bins)))
            runs = [r for r, ok in zip(self._run, keep) if ok]
            ids = {r: i for i, r in enumerate(dict.fromkeys(runs))}
            idx = np.array([ids[r] for r in runs], dtype=int)
            start = np.array(self._start, dtype=float)[keep] / self.fs
            self._cache = (X, start, idx, len(ids))
        return self._cache

    @property
    def span_s(self) -> float:
        """Length of the longest stretch summed with phase (s): the zoom's resolution 1/span."""
        _, _, idx, _ = self._arrays()
        return (int(np.bincount(idx).max()) if len(idx) else 1) * self.n / self.fs

    @property
    def kappa(self) -> float:
        """Gamma shape of the zoom power of noise: (sum R)^2 / sum R^2 over stretches of R."""
        _, _, idx, _ = self._arrays()
        r = np.bincount(idx).astype(float) if len(idx) else np.ones(1)
        return float(r.sum() ** 2 / float((r * r).sum()))

    def power(self, f_hz: np.ndarray) -> np.ndarray:
        """Zoomed density (unit**2/Hz, before ``scale2``) at the frequencies ``f_hz``: noise
        averages to the Welch PSD's density, a steady line rises with the stretch length."""
        f = np.atleast_1d(np.asarray(f_hz, dtype=float))
        X, start, idx, n_runs = self._arrays()
        nu = f / self.df
        lo = int(math.floor(nu.min())) - _HALO
        hi = int(math.ceil(nu.max())) + _HALO
        ks = np.array([k for k in range(lo, hi + 1) if k in self._pos], dtype=int)
        if not len(ks) or not len(idx):
            return np.zeros(len(f))
        # einsum, not a BLAS product: these matrices are small, and a threaded BLAS on a
        # busy machine costs far more than the arithmetic
        Y = np.einsum("bk,kf->bf", X[:, [self._pos[int(k)] for k in ks]],
                      _hann_kernel(nu[None, :] - ks[:, None], self.n))
        Y *= np.exp(-2j * np.pi * np.outer(start, f))
        Z = np.zeros((n_runs, len(f)), dtype=complex)
        np.add.at(Z, idx, Y)
        # |Z|^2 per stretch, over all blocks, in the density scaling of hann_psd: 2/(fs sum w^2)
        return (Z.real ** 2 + Z.imag ** 2).sum(axis=0) * 2.0 / (
            self.fs * self._s2 * len(idx))
