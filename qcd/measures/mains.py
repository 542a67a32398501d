"""Mains hum: finding the mains line (50 or 60 Hz), its frequency, and the hum power of each
harmonic with its standard error, from the Welch PSD (windows of 0.5 s and longer) or by least
squares in shorter windows. numpy/scipy only, SI in and out; imports qcd.measures.spectrum.

Every hum power here is corrected for the noise that falls into the harmonic's band, using the
noise density measured right beside that harmonic in the same windows, and is not clipped at
zero: a harmonic without hum adds about zero (sometimes a little less), so the sum over many
harmonics does not grow with the noise floor. ``power_se`` says how far the noise alone can move
the sum, so a caller can tell "the hum grew" from "the floor grew".
"""
from __future__ import annotations

import functools
import math
from statistics import NormalDist
from dataclasses import dataclass, replace

import numpy as np

from qcd.measures.spectrum import (GRID_DEVIATION_HZ, SEARCH_DEVIATION, _floor_correction,
                                   _running_median, line_threshold)

__all__ = ["Hum", "hum", "mains_family_db", "LineBins", "HumFit", "Z_SIGNIFICANT",
           "DETECT_HARMONICS", "gamma_q"]

Z_SIGNIFICANT = 2.0      # hum power below 2 standard errors is not told apart from the floor
DETECT_HARMONICS = 5     # lines are searched at harmonics 1-5 (METHODS §4.3 family test range)
_FALSE_LINE_P = 1e-4     # chance that noise alone makes one search window (one harmonic of
                         # one family) stand out; about 1e-3 per file over harmonics 1-5
_FIT_STANDS = 3.0        # standard errors a harmonic of the fit must stand above zero
_FLANK_BINS = 20         # floor: median of 20 bins each side beyond a band or search window
_HALO = 4                # bins each side of a frequency used to evaluate its Hann-windowed DTFT
_RUN_BLOCKS = 16         # blocks summed with their phase (about 16 s at 1 s blocks): longer
                         # stretches would smear the line as the grid frequency wanders


@dataclass(frozen=True)
class Hum:
    """Mains hum of one channel; powers in unit**2, noise-bias corrected and not clipped.

    ``source``: 'detected' (a line stands clear of its local floor; the family test chose 50 or
    60 Hz), 'declared' (the rig's mains frequency was given) or 'none' (no line stands out:
    ``upper_power`` bounds the hum of the louder family). ``harmonics`` rows are
    (h, centre Hz, P_h, standard error of P_h).
    """
    line_hz: float
    nominal_hz: float
    source: str
    line_measured: bool            # line_hz refined from the data (else the nominal value)
    family_db: float | None        # 10 log10(S50/S60), METHODS §4.3 (None when not tested)
    harmonics: tuple[tuple[int, float, float, float], ...]
    power: float
    power_se: float
    standing: tuple[int, ...] = ()  # harmonics whose line stands clear of the local floor

    @property
    def detected(self) -> bool:
        return self.source == "detected"

    @property
    def found(self) -> bool:
        """Whether there is a hum value to report (a line found, or the mains declared)."""
        return self.source != "none"

    @property
    def fundamental_power(self) -> float:
        return self.harmonics[0][2] if self.harmonics else 0.0

    @property
    def fundamental_se(self) -> float:
        return self.harmonics[0][3] if self.harmonics else 0.0

    @property
    def significant(self) -> bool:
        """The hum power stands more than Z_SIGNIFICANT standard errors above zero."""
        return self.power > Z_SIGNIFICANT * self.power_se

    @property
    def measured(self) -> bool:
        """Whether the hum is a measurement, not just a bound: a line of the mains stands out
        (found, or at the declared frequency), or the summed power stands above its error."""
        return self.found and (bool(self.standing) or self.significant)

    @property
    def upper_power(self) -> float:
        """One-sided upper bound: max(power, 0) + Z_SIGNIFICANT standard errors."""
        return max(self.power, 0.0) + Z_SIGNIFICANT * self.power_se

    @property
    def rms(self) -> float:
        return math.sqrt(max(self.power, 0.0))

    @property
    def rms_se(self) -> float:
        """How far one standard error of the power moves the RMS up: sqrt(P + se) - sqrt(P).

        Equals the delta-method se/(2 sqrt P) when P >> se, and sqrt(se) at P = 0."""
        p = max(self.power, 0.0)
        return math.sqrt(p + self.power_se) - math.sqrt(p)

    @property
    def rms_max(self) -> float:
        return math.sqrt(self.upper_power)

    def scaled(self, s2: float) -> "Hum":
        """The same hum with every power multiplied by s2 (a unit change squared)."""
        return replace(self, harmonics=tuple((h, c, p * s2, e * s2)
                                             for h, c, p, e in self.harmonics),
                       power=self.power * s2, power_se=self.power_se * s2)


# ----------------------------------------------------------------------------- PSD method

def _span(n: int, centre: float, half: float, df: float) -> tuple[int, int]:
    """[lo, hi) of the bins with |f_k - centre| <= half (f_k = k df), clipped to 0..n."""
    lo = max(int(math.ceil((centre - half) / df - 1e-9)), 0)
    hi = min(int(math.floor((centre + half) / df + 1e-9)) + 1, n)
    return lo, max(hi, lo)


def _flank_floor(psd: np.ndarray, centre: float, half: float, df: float, fix: float
                 ) -> tuple[float, int]:
    """(floor density, flank bins): median of the bins 1-21 bins beyond +-half, / fix."""
    n = len(psd)
    lo, hi = _span(n, centre, half + df * (1.0 + _FLANK_BINS), df)
    ilo, ihi = _span(n, centre, half + df * 1.0, df)
    # the inner span is |f - centre| <= half + df: the flanks are strictly beyond it
    flank = np.concatenate((psd[lo:ilo], psd[ihi:hi]))
    m = len(flank)
    if m < 3:
        return 0.0, m
    k = m // 2
    part = np.partition(flank, (k - 1, k) if m % 2 == 0 else k)
    med = 0.5 * (part[k - 1] + part[k]) if m % 2 == 0 else part[k]
    return float(med) / fix, m


def _median_rel_var(k_segments: int, n_flank: int) -> float:
    """Relative variance of the flank floor: median of n_flank Gamma(K, 1/K) bins, var =
    1/(4 n f(m)^2) (asymptotic variance of a sample median), times 1.94 for the correlation of
    neighbouring Hann bins (1 + 2 (4/9) + 2 (1/36)), over m^2."""
    k = float(max(int(k_segments), 1))
    m = _floor_correction(int(k))
    log_pdf = k * math.log(k) + (k - 1) * math.log(m) - k * m - math.lgamma(k)
    return 1.94 / (4.0 * max(n_flank, 1) * math.exp(2 * log_pdf) * m * m)


def _band(freqs: np.ndarray, psd: np.ndarray, centre: float, half: float, k_segments: int
          ) -> tuple[float, float, float]:
    """(P_h, its standard error, floor density) of the band |f - centre| <= half.

    P_h = sum (P_k - floor) df, floor the median of the flanking bins corrected to a mean
    (METHODS §4.2). Variance of a K-segment Hann average of noise bins: S^2/K each, adjacent
    bins correlated 4/9 and bins two apart 1/36 (|ρ|^2 of the Hann DFT, Harris 1978); plus the
    floor's own scatter times the band width, plus the line-times-noise cross term
    2 Re sum S_k N_k*: variance 2 sum_jk S_j S_k ρ_(j-k) S df per segment, 3.89 P S df/K for
    a line on a bin (Hann kernel -1/4, 1/2, -1/4; ρ = -2/3, 1/6; derived).
    """
    df = float(freqs[1] - freqs[0])
    lo, hi = _span(len(psd), centre, half, df)
    nb = hi - lo
    floor, n_fl = _flank_floor(psd, centre, half, df, _floor_correction(k_segments))
    if nb == 0 or n_fl < 3:
        return 0.0, 0.0, 0.0
    p = float((np.sum(psd[lo:hi]) - nb * floor) * df)
    k = max(int(k_segments), 1)
    c = nb + (8.0 / 9.0) * (nb - 1) + (1.0 / 18.0) * max(nb - 2, 0)
    fd = floor * df
    var = fd * fd * (c / k + nb * nb * _median_rel_var(k, n_fl)) + 3.89 * max(p, 0.0) * fd / k
    return p, math.sqrt(var), floor


def _family_sum(freqs, psd, f0, n_max, k_segments):
    total = 0.0
    df = float(freqs[1] - freqs[0])
    for h in range(1, n_max + 1):
        centre = h * f0
        if abs(centre / 300.0 - round(centre / 300.0)) < 1e-6:   # multiples of 300 Hz: both
            continue
        if centre > 0.9 * freqs[-1]:
            break
        p, _, _ = _band(freqs, psd, centre, max(3 * df, centre * SEARCH_DEVIATION), k_segments)
        total += max(p, 0.0)
    return total


def mains_family_db(freqs: np.ndarray, psd: np.ndarray, k_segments: int = 1) -> float:
    """10 log10(S50/S60): S the floor-corrected power of harmonics 1-5 of each family,
    multiples of 300 Hz left out (METHODS §4.3, common practice). +10 dB or more means 50 Hz,
    -10 dB or less 60 Hz. Here it only chooses the family once a line has been found."""
    s50 = _family_sum(freqs, psd, 50.0, 5, k_segments)
    s60 = _family_sum(freqs, psd, 60.0, 5, k_segments)
    tiny = 1e-300
    return 10 * math.log10((s50 + tiny) / (s60 + tiny))


def _level(shape: float, p: float, rel_sd: float) -> float:
    """t such that noise passes G > t F with chance p: G ~ Gamma(shape, 1/shape) (a density over
    its mean) and F = 1 + rel_sd Z, Z standard normal (the estimated floor over the true one),
    averaged over Z by Gauss-Hermite quadrature."""
    return _level_cached(round(shape, 6), float(f"{p:.3g}"), round(rel_sd, 3))


@functools.lru_cache(maxsize=512)
def _level_cached(shape: float, p: float, rel_sd: float) -> float:
    z, w = _HERMITE
    f = np.maximum(1.0 + rel_sd * z, 0.05)

    def tails(ts: np.ndarray) -> np.ndarray:
        q = gamma_q(shape, (shape * np.outer(ts, f)).ravel()).reshape(len(ts), len(f))
        return q @ w

    # one vectorised pass over a grid around the Wilson-Hilferty level of the gamma alone
    # (Wilson & Hilferty 1931), then log-linear interpolation of the tail between grid points
    zp = NormalDist().inv_cdf(1.0 - p)
    t0 = max((1.0 - 1.0 / (9.0 * shape) + zp / math.sqrt(9.0 * shape)) ** 3, 1e-3)
    ts = np.geomspace(0.5 * t0, 2.0 * t0 * (1.0 + 5.0 * rel_sd), 97)
    tail = tails(ts)
    while tail[-1] > p:                         # not far enough out yet
        ts = ts * (ts[-1] / ts[0])
        tail = tails(ts)
    i = int(np.argmax(tail <= p))
    if i == 0:
        return float(ts[0])
    l0, l1 = math.log(max(tail[i - 1], 1e-300)), math.log(max(tail[i], 1e-300))
    frac = (math.log(p) - l0) / (l1 - l0) if l1 != l0 else 1.0
    return float(math.exp(math.log(ts[i - 1]) + frac * math.log(ts[i] / ts[i - 1])))


def gamma_q(a: float, x: np.ndarray) -> np.ndarray:
    """Regularised upper incomplete gamma Q(a, x) = P(Gamma(a, 1) > x), vectorised over x.

    Series below x = a + 1 and Lentz's continued fraction above (Press et al., Numerical
    Recipes 6.2, cited from memory); for a > 5000 the Wilson-Hilferty cube-root normal
    approximation (Wilson & Hilferty 1931). Tested against scipy.special.gammaincc. Written out
    here so that a scan does not load scipy.special (about 0.5 s at start-up)."""
    x = np.atleast_1d(np.asarray(x, dtype=float))
    out = np.ones(len(x))
    if a > 5000.0:
        z = ((np.maximum(x, 0.0) / a) ** (1.0 / 3.0) - (1.0 - 1.0 / (9.0 * a))) \
            * math.sqrt(9.0 * a)
        return 0.5 * np.array([math.erfc(v / math.sqrt(2.0)) for v in z])
    pos = x > 0
    lead = np.zeros(len(x))
    lead[pos] = np.exp(a * np.log(x[pos]) - x[pos] - math.lgamma(a))
    low = pos & (x < a + 1.0)
    if low.any():                                       # P by its series, Q = 1 - P
        xl = x[low]
        term = np.full(len(xl), 1.0 / a)
        total = term.copy()
        for n in range(1, 1000):
            term = term * xl / (a + n)
            total += term
            if np.all(term < total * 1e-15):
                break
        out[low] = 1.0 - lead[low] * total
    high = pos & ~low
    if high.any():                                      # Q by the continued fraction
        xh = x[high]
        tiny = 1e-300
        b = xh + 1.0 - a
        c = np.full(len(xh), 1.0 / tiny)
        d = 1.0 / b
        h = d.copy()
        for i in range(1, 1000):
            an = -i * (i - a)
            b = b + 2.0
            d = an * d + b
            d = np.where(np.abs(d) < tiny, tiny, d)
            c = b + an / c
            c = np.where(np.abs(c) < tiny, tiny, c)
            d = 1.0 / d
            delta = d * c
            h = h * delta
            if np.all(np.abs(delta - 1.0) < 1e-15):
                break
        out[high] = lead[high] * h
    return np.clip(out, 0.0, 1.0)


_z, _w = np.polynomial.hermite_e.hermegauss(24)
_HERMITE = (_z, _w / _w.sum())


def _grandke(psd, k, floor, df) -> float:
    """Hann-window peak interpolation (Grandke 1983): delta = (2a-1)/(a+1) from the larger
    neighbour's amplitude ratio; exact for one tone without noise."""
    if not 0 < k < len(psd) - 1:
        return 0.0
    mag = np.sqrt(np.maximum(psd[k - 1:k + 2] - floor, 0.0))
    if mag[1] <= 0:
        return 0.0
    side = 1.0 if mag[2] >= mag[0] else -1.0
    a = (mag[2] if side > 0 else mag[0]) / mag[1]
    return side * float(np.clip((2 * a - 1) / (a + 1), 0.0, 1.0)) * df


@dataclass
class _Search:
    """One harmonic's search window and what stood out in it."""
    h: int
    family: float
    floor: float
    stands: bool
    peak_hz: float
    strength: float            # peak density over the floor


def _search(freqs, psd, local, F, h, k_segments) -> _Search | None:
    df = float(freqs[1] - freqs[0])
    c = h * F
    half = c * SEARCH_DEVIATION + df
    lo = max(int(math.ceil((c - half) / df)), 1)
    sel = np.arange(lo, min(int(math.floor((c + half) / df)), len(psd) - 2) + 1)
    if h > DETECT_HARMONICS:
        # higher harmonics: only the narrow-line test, against the running-median floor
        if len(sel) == 0:
            return None
        mx = (psd[sel] >= psd[sel - 1]) & (psd[sel] > psd[sel + 1]) & (local[sel] > 0)
        stands = bool(np.any(psd[sel[mx]] > line_threshold(k_segments) * local[sel[mx]]))
        return _Search(h, F, 0.0, stands, c, 0.0)
    floor, n_fl = _flank_floor(psd, c, half, df, _floor_correction(k_segments))
    if len(sel) == 0 or n_fl < 3 or floor <= 0:
        return None
    # local maxima inside the window only: the skirt of a line just outside rises to the
    # window's edge without a maximum there
    is_max = (psd[sel] >= psd[sel - 1]) & (psd[sel] > psd[sel + 1])
    if not is_max.any():
        return _Search(h, F, floor, False, c, 0.0)
    k = int(sel[is_max][np.argmax(psd[sel[is_max]])])
    # the narrow-line test of spectral_lines (a peak over its running-median floor):
    # whatever it would list near a mains harmonic is mains
    stands = bool(local[k] > 0 and psd[k] > line_threshold(k_segments) * local[k])
    if h <= DETECT_HARMONICS and not stands:
        # the 3 bins around the peak: mean 3 S, variance 4.83 S^2/K for a K-segment Hann
        # average (adjacent bins correlated 4/9, two apart 1/36), taken as a Gamma of those
        # moments, against the level noise passes with chance _FALSE_LINE_P in the widest
        # window searched (harmonic 5 of 60 Hz; one level for all, so it is computed once)
        three = float(np.sum(psd[k - 1:k + 2])) / floor / 3.0
        shape = 9.0 * max(k_segments, 1) / 4.83
        rel_sd = math.sqrt(_median_rel_var(k_segments, n_fl))
        widest = 2 * (DETECT_HARMONICS * 60.0 * SEARCH_DEVIATION + df) / df
        stands = three > _level(shape, _FALSE_LINE_P / max(1.0, widest), rel_sd)
    peak_hz = float(freqs[k]) + _grandke(psd, k, floor, df)
    return _Search(h, F, floor, stands, peak_hz, float(psd[k]) / floor)


def _coherent_fundamental(found: list[_Search], lines: "LineBins", scale2: float,
                          k_segments: int) -> None:
    """Search the fundamental's window again in the phase-coherent zoom (contiguous blocks):
    a steady line gains the stretch length over the noise there. The blocks' Hann windows
    repeat every block, so a line summed with its phase has side lobes one bin either side
    at a quarter of its power: a peak counts only as the highest point within 1.5 bins of
    itself, so the side lobe of a line just outside the window does not."""
    first = next((s for s in found if s.h == 1), None)
    if first is None or first.floor <= 0:
        return
    df = lines.df
    c = first.family
    half = c * SEARCH_DEVIATION + df
    step = 1.0 / (4.0 * lines.span_s)
    grid = np.arange(c - half - 3 * df, c + half + 3 * df + step / 2, step)
    pw = lines.power(grid) * scale2 / first.floor
    i = np.arange(1, len(pw) - 1)
    peak = (pw[i] >= pw[i - 1]) & (pw[i] > pw[i + 1]) & (np.abs(grid[i] - c) <= half)
    for j in i[peak][np.argsort(-pw[i[peak]])]:
        if pw[j] >= pw[np.abs(grid - grid[j]) <= 1.5 * df].max():
            break
    else:
        return
    n_fl = 2 * _FLANK_BINS
    rel_sd = math.sqrt(_median_rel_var(k_segments, n_fl))
    cells = max(1.0, 2 * half * lines.span_s)
    if pw[j] > _level(lines.kappa, _FALSE_LINE_P / cells, rel_sd):
        first.stands = True
        first.peak_hz = float(grid[j])
        first.strength = float(pw[j])


def _rows(freqs, psd, f0, k_segments, max_hz):
    df = float(freqs[1] - freqs[0])
    rows = []
    h = 1
    while h * f0 <= max_hz and h * f0 < freqs[-1] - 3 * df:
        half = max(3 * df, h * GRID_DEVIATION_HZ)
        p, se, _ = _band(freqs, psd, h * f0, half, k_segments)
        rows.append((h, h * f0, p, se))
        h += 1
    return tuple(rows)


def _total(rows) -> tuple[float, float]:
    return (float(sum(r[2] for r in rows)),
            math.sqrt(float(sum(r[3] * r[3] for r in rows))))


def hum(freqs: np.ndarray, psd: np.ndarray, *, k_segments: int = 1,
        mains_hz: float | None = None, max_hz: float = 1000.0,
        lines: "LineBins | None" = None) -> Hum:
    """Mains hum from a one-sided density PSD (unit**2/Hz) averaged over ``k_segments``.

    P_h = sum over |f_k - h f0| <= W_h of (P_k - floor) df, W_h = max(3 df, h * 0.2 Hz), floor
    the median of the flanking bins corrected for the median/mean ratio of a K-segment average;
    hum power = sum of P_h for h f0 <= max_hz, none clipped at zero [METHODS §4.2; ENBW: Harris
    1978]. Each P_h carries a standard error from the local floor (see ``_band``).

    Without ``mains_hz`` a line within +-1.5 % of a harmonic of 50 or 60 Hz (EN 50160 +-1 % plus
    margin) that stands clear of its local floor makes the channel's mains: at harmonics 1-5 the
    peak of the phase-coherent zoomed spectrum (``lines``; else the 3 bins around the PSD peak)
    must pass the level that noise passes with chance 1e-6 per frequency cell, and at any
    harmonic up to ``max_hz`` the narrow-line test of ``spectral_lines`` counts too. The family
    test of METHODS §4.3 then only chooses 50 or 60 Hz. When nothing stands out the result has
    source 'none' and only its ``upper_power`` is meaningful. f0 is refined from the standing
    harmonics 1-5: the maximum of their summed zoomed spectra (``lines``), else Hann-window
    peak interpolation.
    """
    df = float(freqs[1] - freqs[0])
    top = min(len(psd), int((max(max_hz, 5 * 61.0) * (1 + SEARCH_DEVIATION) + 12 * df) / df) + 30)
    local = np.zeros(len(psd))
    local[:top] = _running_median(psd[:top], 51) / _floor_correction(k_segments)
    families = (float(mains_hz),) if mains_hz else (50.0, 60.0)
    scale2 = lines.scale2 if lines is not None else 1.0
    found: dict[float, list[_Search]] = {}
    for F in families:
        found[F] = []
        h = 1
        while h * F <= max_hz and h * F < 0.9 * freqs[-1]:
            s = _search(freqs, psd, local, F, h, k_segments)
            if s is not None:
                found[F].append(s)
            h += 1
    if lines is not None and lines.count and lines.span_s > lines.n / lines.fs:
        for F in families:
            if not any(s.stands for s in found[F]):
                _coherent_fundamental(found[F], lines, scale2, k_segments)
    standing = {F: [s for s in found[F] if s.stands] for F in families}
    family = None
    if mains_hz:
        nominal, source = float(mains_hz), "declared"
    elif not any(standing.values()):
        best = None
        for F in families:
            rows = _rows(freqs, psd, F, k_segments, max_hz)
            p, se = _total(rows)
            cand = Hum(F, F, "none", False, None, rows, p, se)
            if best is None or cand.upper_power > best.upper_power:
                best = cand
        return best
    else:
        family = mains_family_db(freqs, psd, k_segments)
        only = [F for F in families if standing[F]]
        nominal = only[0] if len(only) == 1 else (50.0 if family >= 0 else 60.0)
        source = "detected"
    stand = standing[nominal]
    f0, measured = _refine(stand, nominal, lines, scale2, df)
    rows = _rows(freqs, psd, f0, k_segments, max_hz)
    p, se = _total(rows)
    return Hum(f0, nominal, source, measured, family, rows, p, se,
               tuple(s.h for s in stand))


def _refine(stand: list[_Search], nominal: float, lines, scale2, df: float
            ) -> tuple[float, bool]:
    """(f0, measured): from the standing harmonics 1-5, else the nominal frequency.

    With ``lines``: the strongest harmonic's peak is searched in its phase-coherent zoomed
    spectrum within +-0.6 bin of the PSD's interpolated peak, then f0 maximises the sum of the
    standing harmonics' zoomed spectra, each over its own floor (the maximum-likelihood
    combination for steady tones in locally white noise). Else the PSD peaks, interpolated,
    weighted by (peak over floor) h^2 (a higher harmonic pins f0 h times tighter)."""
    low = [s for s in stand if s.h <= DETECT_HARMONICS]
    if not low:
        return nominal, False
    lo_f, hi_f = nominal * (1 - SEARCH_DEVIATION), nominal * (1 + SEARCH_DEVIATION)
    if lines is not None and lines.count:
        best = max(low, key=lambda s: s.strength)
        step = 1.0 / (4.0 * lines.span_s)
        grid = np.arange(best.peak_hz - 0.6 * df, best.peak_hz + 0.6 * df + step / 2, step)
        centre = float(grid[int(np.argmax(lines.power(grid)))]) / best.h
        half = step / best.h
        for _ in range(2):
            grid = np.linspace(centre - half, centre + half, 41)
            score = np.zeros(len(grid))
            for s in low:
                score += lines.power(s.h * grid) * scale2 / s.floor
            centre = float(grid[int(np.argmax(score))])
            half /= 20.0
        return float(np.clip(centre, lo_f, hi_f)), True
    num = den = 0.0
    for s in low:
        w = s.strength * s.h * s.h
        num += w * s.peak_hz / s.h
        den += w
    return float(np.clip(num / den, lo_f, hi_f)), True


# ----------------------------------------------------------------------------- phase-coherent zoom

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


# ----------------------------------------------------------------------------- short windows

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
