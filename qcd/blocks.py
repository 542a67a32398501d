"""Baseline blocks -> noise and spectral measures: ``Blocks`` accumulates blocks of L samples
(per-block SD, band SD, peak-to-peak, mean, median from one rfft per block; the streaming Welch
sum; line bins and the short-window hum fit), ``spectral`` turns the Welch PSD into hum, bands,
corner, aliasing and lines. ``put`` stores a value in its display unit.
Imports qcd.measures, qcd.results, qcd.units.
"""
from __future__ import annotations

import math
from typing import Callable

import numpy as np

from qcd import units
from qcd.measures import humfit, mains, zoom
from qcd.measures import noise as nz
from qcd.measures import spectrum as sp
from qcd.results import Measure, Spectrum, display_unit

__all__ = ["Blocks", "put", "spectral", "MAX_HUM_DF", "KEEP_BYTES"]

MAX_HUM_DF = 2.0          # 50 and 60 Hz families need bins of at most 2 Hz to stay apart
_MEDIAN_SAMPLES = 512     # block medians from every k-th sample, k = L // 512 (speed)
KEEP_BYTES = 40_000_000   # loudest block spectra kept (events taken out of the PSD) where
                          # they cannot be read again (episodic windows)


class Blocks:
    """Accumulates baseline blocks of L samples: per-block noise values and the Welch sum.

    Blocks arrive in any linear unit (raw converter counts on the gap-free path); ``scale`` and
    ``offset`` turn results into SI. ``rails`` (same unit as the blocks) count clipped samples.
    ``reread(starts)``: the raw blocks that begin at these samples, read again from the file
    (gap-free); given, no block spectra are kept while streaming, and the event blocks' spectra
    are computed again from their samples when the PSD leaves them out. ``shared``: work
    buffers shared by Blocks fed one after the other in one thread (sp.BlockFFT).
    """

    def __init__(self, L: int, fs: float, scale: float = 1.0, offset: float = 0.0,
                 rails: tuple[float, float] | None = None, *,
                 keep_bytes: int = KEEP_BYTES, single: bool = False,
                 reread: Callable[[np.ndarray], np.ndarray] | None = None,
                 shared: dict | None = None) -> None:
        self.L, self.fs = L, fs
        self.scale, self.offset, self.rails = scale, offset, rails
        self.reread = reread
        self._starts: list[np.ndarray] = []      # each block's first sample (with reread)
        self.welch = sp.WelchAccumulator(L, fs, keep_bytes=0 if reread else keep_bytes)
        # single: integer blocks in float32; shared: work buffers of the file's other channels
        self.fft = sp.BlockFFT(L, single=single, shared=shared)
        self.clipped = 0
        self.nonfinite = 0                # blocks left out for NaN/inf samples
        self.flat = 0                     # blocks whose samples all hold one value
        self.humfit: humfit.HumFit | None = None   # short windows with a declared mains_hz
        self.lines: zoom.LineBins | None = None  # bins near the mains harmonics (line_hz)
        self._median_step = max(1, L // _MEDIAN_SAMPLES)
        self.parts: dict[str, list[np.ndarray]] = {k: [] for k in
                                                   ("sd", "sd_band", "pp", "mean", "median", "t")}

    def add(self, blocks: np.ndarray, t0: np.ndarray, starts: np.ndarray | None = None,
            run: int = 0) -> None:
        """Add (n, L) blocks: float64 (detrended in place) or raw integer counts.

        ``starts``: each block's first sample on the continuous stretch ``run`` (a sweep);
        by default from ``t0`` (block centres) on one stretch, as in a gap-free file."""
        if starts is None:
            starts = np.rint(np.asarray(t0) * self.fs - self.L / 2).astype(np.int64)
        integer = blocks.dtype.kind in "iu"
        if not integer:
            # float samples: NaN/inf and clipping from each row's range before transforming
            _, mx, mn = nz.peak_to_peak(blocks)
            if self.rails is not None:
                lo, hi = self.rails
                for i in np.flatnonzero((mx >= hi) | (mn <= lo)):
                    self.clipped += nz.clipping_count(blocks[i], self.rails)
            finite = np.isfinite(mx) & np.isfinite(mn)      # float files may hold NaN/inf
            self.flat += int(np.count_nonzero((mx == mn) & finite))
            if not finite.all():
                self.nonfinite += int((~finite).sum())
                blocks, t0, starts = blocks[finite], t0[finite], starts[finite]
                if not len(blocks):
                    return
        if self.reread is not None:
            self._starts.append(np.asarray(starts, dtype=np.int64))
        med = self._medians(blocks)
        # spectra in groups of up to 8 MB of rows: a whole chunk of the gap-free pass at once
        # (measured: 2 MB groups, two a chunk, cost 4-7 % more; the passes gain nothing from
        # smaller groups, the calls per group add up)
        g = max(1, (1 << 23) // ((4 if self.fft.single else 8) * self.L))
        for a in range(0, blocks.shape[0], g):
            X, mean, slope = self.fft(blocks[a:a + g], med[a:a + g])
            if self.humfit is not None:
                self.humfit.add(self.fft.detrended)
            # the detrended rows' range (methods §3.3), taken as each row was detrended
            dmx = self.fft.top.astype(float)
            dmn = self.fft.bottom.astype(float)
            pp = dmx - dmn
            if integer:
                self._integer_rows(blocks[a:a + g], slope, pp, dmx, dmn)
            sd, sd_band = nz.parseval_sd(X, self.L, self.fs)
            self.welch.add(X, sd)
            if self.lines is not None:
                self.lines.add(X, starts[a:a + g], run)
            for k, v in (("sd", sd), ("sd_band", sd_band), ("mean", mean), ("pp", pp)):
                self.parts[k].append(v)
        for k, v in (("median", med), ("t", t0)):
            self.parts[k].append(v)

    def _medians(self, blocks: np.ndarray) -> np.ndarray:
        """Each row's median from every k-th sample (the block medians; on the float32 path
        also the offset taken off before the transform)."""
        sub = blocks[:, ::self._median_step]
        h = sub.shape[1] // 2
        if sub.shape[1] % 2:
            return np.partition(sub, h, axis=1)[:, h].astype(float)   # a copy, no view kept
        part = np.partition(sub, (h - 1, h), axis=1)
        return 0.5 * (part[:, h - 1].astype(float) + part[:, h])

    def _spectra(self, idx: np.ndarray) -> np.ndarray:
        """The rfft rows of blocks ``idx`` (Welch order) from their samples read again: the
        same transform ``add`` made of them."""
        if len(self._starts) > 1:                  # joined once, asked in batches
            self._starts = [np.concatenate(self._starts)]
        rows = self.reread(self._starts[0][idx])
        X, _, _ = self.fft(rows, self._medians(rows))
        return X.copy()

    def _integer_rows(self, rows: np.ndarray, slope: np.ndarray, pp: np.ndarray,
                      dmx: np.ndarray, dmn: np.ndarray) -> None:
        """Flat rows and clipping of integer rows from the detrended range, without a pass
        over the raw samples: a row is x = base + slope c + r (r the residual, c the centred
        sample index), so its range lies within base + |slope| max|c| + [min r, max r]; only a
        row whose bound reaches a rail is counted sample by sample. A row holds one value
        exactly when its slope and the range of its residual are 0 (integer samples: the
        offset, line and residual are then exact)."""
        self.flat += int(np.count_nonzero((slope == 0) & (pp == 0)))
        if self.rails is None:
            return
        lo, hi = self.rails
        base = self.fft.base if self.fft.base is not None else 0.0
        reach = np.abs(slope) * ((self.L - 1) / 2.0)
        top = base + reach + dmx
        bottom = base - reach + dmn
        # float32 residuals: a margin of a count plus their rounding, so a bound never
        # falls short of the row's true maximum (minimum)
        margin = 1.0 + 1e-4 * (np.abs(top) + np.abs(bottom))
        for i in np.flatnonzero((top + margin >= hi) | (bottom - margin <= lo)):
            self.clipped += nz.clipping_count(rows[i], self.rails)

    def arrays(self) -> dict[str, np.ndarray]:
        """Per-block values in SI."""
        out = {k: (np.concatenate(v) if v else np.empty(0)) for k, v in self.parts.items()}
        g = abs(self.scale)
        for k in ("sd", "sd_band", "pp"):
            out[k] = out[k] * g
        for k in ("mean", "median"):
            out[k] = out[k] * self.scale + self.offset
        return out

    def psd(self, exclude: frozenset[int]) -> tuple[np.ndarray, int]:
        P, n = self.welch.psd(exclude, self._spectra if self.reread is not None else None)
        if self.lines is not None:
            self.lines.exclude(exclude)
        return P * self.scale ** 2, n


def put(out: dict[str, Measure], name: str, value_si: float | None, dim: str) -> None:
    if value_si is None or not np.isfinite(value_si):
        return
    unit = display_unit(name, dim) if dim in units.DISPLAY else ""
    value = units.from_si(value_si, unit) if dim not in ("", "%") else float(value_si)
    out[name] = Measure(name, float(value), unit)


def _hum_measures(h: "mains.Hum", dim: str, var: float, out: dict[str, Measure],
                  notes: list[str]) -> None:
    """hum_rms with its standard error (and an upper bound when it is not told apart from the
    floor); without a mains line found or declared, only the bound, hum_rms_max."""
    unit = display_unit("hum_rms", dim) if dim in units.DISPLAY else ""
    show = (lambda v: f"{units.from_si(v, unit):.3g} {unit}") if unit else (lambda v: f"{v:.3g}")
    if not h.found:
        put(out, "hum_rms_max", h.rms_max, dim)
        notes.append(f"no mains line stands clear of its local noise floor at harmonics 1-"
                     f"{mains.DETECT_HARMONICS} of 50 or 60 Hz: hum_rms not measured, at most "
                     f"{show(h.rms_max)} (hum_rms_max, {mains.Z_SIGNIFICANT:g} standard errors)")
        return
    put(out, "hum_rms", h.rms, dim)
    put(out, "hum_rms_se", h.rms_se, dim)
    put(out, "hum_fundamental_rms", math.sqrt(max(h.fundamental_power, 0.0)), dim)
    if var > 0:
        out["hum_fraction"] = Measure("hum_fraction", max(h.power, 0.0) / var, "")
    if not h.measured:
        put(out, "hum_rms_max", h.rms_max, dim)
        notes.append(f"hum not told apart from the noise floor near the harmonics: hum_rms "
                     f"{show(h.rms)} +- {show(h.rms_se)}, at most {show(h.rms_max)} "
                     f"(hum_rms_max)")


def spectral(acc: Blocks, keep_events: np.ndarray, fs: float, dim: str,
              mains_hz: float | None, out: dict[str, Measure], notes: list[str]
              ) -> Spectrum | None:
    L = acc.L
    psd, k_seg = acc.psd(frozenset(int(i) for i in np.flatnonzero(keep_events)))
    if not acc.welch.exact:
        notes.append("more event blocks than kept spectra: some events stay in the PSD")
    freqs = np.arange(len(psd)) * fs / L
    df = fs / L
    var = float(np.sum(psd) * df)
    line = None
    if df <= MAX_HUM_DF and fs / 2 > 75.0:
        h = mains.hum(freqs, psd, k_segments=k_seg, mains_hz=mains_hz, lines=acc.lines)
        if h.found and h.line_measured:
            line = h.line_hz
            out["line_hz"] = Measure("line_hz", round(h.line_hz, 2), "Hz")
        elif h.found:
            line = h.line_hz
            notes.append(f"no line stands clear of the noise at the declared mains "
                         f"{h.line_hz:g} Hz (harmonics 1-{mains.DETECT_HARMONICS}): hum taken "
                         f"at {h.line_hz:g} Hz, line_hz not measured")
        _hum_measures(h, dim, var, out, notes)
    elif acc.humfit is not None and acc.humfit.count:
        h = acc.humfit.result().scaled(acc.scale ** 2)
        _hum_measures(h, dim, var, out, notes)
        notes.append(f"hum fitted at the declared mains {acc.humfit.line_hz:g} Hz by least "
                     f"squares in {acc.humfit.count} windows of {L / fs * 1e3:.4g} ms (too "
                     f"short for the PSD to resolve the line; line_hz not measured), each "
                     f"harmonic corrected by the noise density measured beside it")
    else:
        more = "" if mains_hz else "; declare the rig's mains_hz (or --mains) to fit it"
        notes.append(f"hum not measured: baseline windows of {L / fs * 1e3:.4g} ms give "
                     f"{df:.3g} Hz bins (needs <= {MAX_HUM_DF:g} Hz){more}")
    corner = sp.corner_hz(freqs, psd, k_seg) if len(psd) > 40 else None
    if corner is not None:
        out["corner_hz"] = Measure("corner_hz", corner, "Hz")
        out["oversampling"] = Measure("oversampling", fs / corner, "")
    else:
        notes.append("corner_hz: the noise spectrum does not fall 3 dB below its plateau "
                     "before Nyquist")
    ratio = sp.alias_ratio_db(freqs, psd)
    if ratio is not None:
        out["alias_risk"] = Measure("alias_risk", bool(ratio > sp.ALIAS_LIMIT_DB), "")
    for name, (lo, hi) in sp.BANDS.items():
        top = (corner if corner is not None else 0.95 * fs / 2) if hi == "corner" else hi
        if top <= lo or lo >= fs / 2:
            continue
        put(out, name, sp.band_rms(freqs, psd, lo, min(top, fs / 2), line), dim)
    lines = sp.spectral_lines(freqs, psd, k_segments=k_seg, line_hz=line or mains_hz)
    unit = display_unit("noise_rms", dim) if dim else ""
    f = 1.0 / units.FACTORS[unit] if dim else 1.0
    out["spectral_lines"] = Measure("spectral_lines",
                                    tuple((round(fq, 3), r * f) for fq, r in lines), unit)
    cf, cd = sp.compact_spectrum(freqs, psd)
    return Spectrum(tuple(float(v) for v in cf), tuple(float(v) * f * f for v in cd), unit)
