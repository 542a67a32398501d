"""Mains hum: finding the mains line (50 or 60 Hz), its frequency, and the hum power of each
harmonic with its standard error, from the Welch PSD (windows of 0.5 s and longer; shorter
windows: qcd.measures.humfit; the phase-coherent zoom that pins the frequency:
qcd.measures.zoom). numpy only, SI in and out; imports qcd.measures.spectrum.

Every hum power here is corrected for the noise that falls into the harmonic's band, using the
noise density measured right beside that harmonic in the same windows, and is not clipped at
zero: a harmonic without hum adds about zero (sometimes a little less), so the sum over many
harmonics does not grow with the noise floor. ``power_se`` says how far the noise alone can move
the sum, so a caller can tell "the hum grew" from "the floor grew".
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from qcd.measures.spectrum import (GRID_DEVIATION_HZ, SEARCH_DEVIATION, _floor_correction,
                                   _running_median, line_threshold)

__all__ = ["Hum", "hum", "mains_family_db", "Z_SIGNIFICANT", "DETECT_HARMONICS", "gamma_q"]

Z_SIGNIFICANT = 2.0      # hum power below 2 standard errors is not told apart from the floor
DETECT_HARMONICS = 5     # lines are searched at harmonics 1-5 (METHODS §4.3 family test range)
_FALSE_LINE_P = 1e-4     # chance that noise alone makes one search window (one harmonic of
                         # one family) stand out; about 1e-3 per file over harmonics 1-5
_FLANK_BINS = 20         # floor: median of 20 bins each side beyond a band or search window


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
    z, w = _hermite()
    f = np.maximum(1.0 + rel_sd * z, 0.05)

    def tails(ts: np.ndarray) -> np.ndarray:
        q = gamma_q(shape, (shape * np.outer(ts, f)).ravel()).reshape(len(ts), len(f))
        return q @ w

    # one vectorised pass over a grid around the Wilson-Hilferty level of the gamma alone
    # (Wilson & Hilferty 1931), then log-linear interpolation of the tail between grid points
    zp = _normal_quantile(1.0 - p)
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
        cut = np.empty(len(xl))
        for n in range(1, 1000):                        # in place: the same operations
            term *= xl
            term /= a + n
            total += term
            if np.less(term, np.multiply(total, 1e-15, out=cut)).all():
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


# 24-point Gauss-Hermite rule (probabilists', weight exp(-z^2/2)): the values of
# numpy.polynomial.hermite_e.hermegauss(24), written out so that a scan does not import
# numpy.polynomial (12-18 ms of start-up); tests/test_mains.py checks them against it and
# against the normal moments the rule integrates exactly.
_HERMITE_Z = (
    -8.507803519195257, -7.437890666021663, -6.541675005098634, -5.732747175251201,
    -4.97804137463912, -4.260383605019905, -3.56930676407356, -2.8977286432233136,
    -2.2404678516917524, -1.5934804298164202, -0.953421922932109, -0.31737009662945237,
    0.31737009662945237, 0.953421922932109, 1.5934804298164202, 2.2404678516917524,
    2.8977286432233136, 3.56930676407356, 4.260383605019905, 4.97804137463912,
    5.732747175251201, 6.541675005098634, 7.437890666021663, 8.507803519195257)
_HERMITE_W = (
    2.3537725005214355e-16, 9.312059250837578e-13, 4.308054103053398e-10,
    5.683683542388722e-08, 3.052220346806378e-06, 8.045024864361494e-05,
    0.0011648770802427275, 0.00996788037903597, 0.05295589223511062, 0.18065110558013295,
    0.4047189801605703, 0.6037718421428449, 0.6037718421428449, 0.4047189801605703,
    0.18065110558013295, 0.05295589223511062, 0.00996788037903597, 0.0011648770802427275,
    8.045024864361494e-05, 3.052220346806378e-06, 5.683683542388722e-08,
    4.308054103053398e-10, 9.312059250837578e-13, 2.3537725005214355e-16)


@functools.cache
def _hermite() -> tuple[np.ndarray, np.ndarray]:
    """24-point Gauss-Hermite nodes and weights (probabilists'), the weights summing to 1."""
    z, w = np.array(_HERMITE_Z), np.array(_HERMITE_W)
    return z, w / w.sum()


def _normal_quantile(q: float) -> float:
    """The standard normal quantile: statistics.NormalDist().inv_cdf (Wichura's AS241),
    through its compiled helper when CPython has one (importing statistics loads fractions
    and decimal, 10-17 ms of a scan's start-up)."""
    if not 0.0 < q < 1.0:
        raise ValueError(f"a normal quantile needs 0 < q < 1, got {q}")
    try:
        from _statistics import _normal_dist_inv_cdf
    except ImportError:                    # pragma: no cover - other Pythons
        from statistics import NormalDist
        return NormalDist().inv_cdf(q)
    return _normal_dist_inv_cdf(q, 0.0, 1.0)


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


class _Search:
    """One harmonic's search window and what stood out in it. A plain class: a dataclass
    compiles its generated methods when the module loads (0.4 ms of every start, measured)
    and this record needs none of them."""
    __slots__ = ("h", "family", "floor", "stands", "peak_hz", "strength")

    def __init__(self, h: int, family: float, floor: float, stands: bool, peak_hz: float,
                 strength: float) -> None:
        self.h = h
        self.family = family
        self.floor = floor
        self.stands = stands
        self.peak_hz = peak_hz
        self.strength = strength          # peak density over the floor


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


def _coherent_fundamental(found: list[_Search], lines: Any, scale2: float,
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
        lines: Any = None) -> Hum:
    """Mains hum from a one-sided density PSD (unit**2/Hz) averaged over ``k_segments``.

    P_h = sum over |f_k - h f0| <= W_h of (P_k - floor) df, W_h = max(3 df, h * 0.2 Hz), floor
    the median of the flanking bins corrected for the median/mean ratio of a K-segment average;
    hum power = sum of P_h for h f0 <= max_hz, none clipped at zero [METHODS §4.2; ENBW: Harris
    1978]. Each P_h carries a standard error from the local floor (see ``_band``).

    Without ``mains_hz``, a line within +-1.5 % of a harmonic of 50 or 60 Hz (EN 50160 +-1 % plus
    margin) that stands clear of its local floor makes the channel's mains: at harmonics 1-5 the
    3 bins around a local maximum in the window must pass the level noise passes with chance
    1e-4 per window, or, on contiguous blocks, the fundamental's peak in the phase-coherent zoom
    must (``_coherent_fundamental``); at any harmonic up to ``max_hz`` whatever the narrow-line
    test of ``spectral_lines`` would list counts too. The family test of METHODS §4.3 then only
    chooses 50 or 60 Hz. When nothing stands out the result has source 'none' and only its
    ``upper_power`` (the louder family's) is meaningful. f0 is refined from the standing
    harmonics 1-5 (``_refine``). ``lines`` is the blocks' qcd.measures.zoom.LineBins (None: no
    zoom).
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
