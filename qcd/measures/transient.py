"""Capacitive transients through a known low-pass: sums of exponentials convolved with the filter.

After a voltage step the clamp current of any passive cell (one compartment, soma plus
dendrites) is I(t) = I_ss + Σ A_i·exp(-t/τ_i) (METHODS §1.5); the converter sees it through the
amplifier's low-pass H(s). The model fitted here is that sum convolved with H, in closed form
from H's poles and residues, so each A_i is the amplitude at the onset (the tail of a filtered
exponential is A·H(-1/τ)·exp(-t/τ), METHODS §1.2). Imports numpy and scipy only.
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize
from scipy.special import fdtrc      # the F distribution's survival function (scipy.stats.f.sf)

__all__ = ["LowPass", "ExpFit", "Selection", "fit_components", "select_components",
           "refusal", "fast_part", "BESSEL4_NOISE_BW", "LEAD"]

# Equivalent white-noise bandwidth of a 4-pole Bessel low-pass, times its corner (METHODS §3.2).
BESSEL4_NOISE_BW = 1.0464

# scipy.signal.bessel(4, 1.0, analog=True, norm="mag", output="zpk"): the 4-pole Bessel
# low-pass with its -3 dB corner at 1 rad/s (poles, gain), written out so that measuring a test
# pulse does not import scipy.signal and, through it, scipy.stats (0.35 s of a scan's start-up,
# measured); tests/test_transient.py pins them to scipy's
_BESSEL4_POLES = ((-0.995208764350272 + 1.257105739454664j),
                  (-1.3700678305514422 + 0.41024971749375155j),
                  (-1.3700678305514422 - 0.41024971749375155j),
                  (-0.995208764350272 - 1.257105739454664j))
_BESSEL4_GAIN = 5.258199010244144

LEAD = 2                  # samples before the first one at the new level: they pin the onset
_GROWTH = 0.05            # later samples enter as block means, blocks ~5% of the elapsed time
_ONSET_RANGE = (-1.5, 1.5)  # onset search, samples around the first sample at the new level
_F_TEST_P = 1e-3          # a further component must improve the fit at this significance
_MIN_SHARE = 0.02         # ... and carry at least 2% of the onset amplitude or of the charge
_MIN_RATIO = 1.3          # ... with a time constant distinct from its neighbours


@dataclass(frozen=True)
class LowPass:
    """An analog low-pass by its poles and residues: H(s) = Σ r_j/(s - p_j), unity DC gain.

    ``bessel(corner_hz, poles)`` is scipy.signal.bessel with norm='mag' (-3 dB at the corner),
    the usual amplifier output filter.
    """
    corner_hz: float
    poles: tuple[complex, ...]
    residues: tuple[complex, ...]

    @classmethod
    def bessel(cls, corner_hz: float, poles: int = 4) -> "LowPass":
        wo = 2 * math.pi * corner_hz
        if poles == 4:                # as scipy scales its 1 rad/s prototype (lp2lp_zpk)
            p, k = wo * np.array(_BESSEL4_POLES), _BESSEL4_GAIN * wo ** 4
        else:
            from scipy import signal
            _, p, k = signal.bessel(poles, wo, analog=True, norm="mag", output="zpk")
        p = np.asarray(p, dtype=complex)
        res = []
        for j in range(len(p)):
            d = np.prod([p[j] - p[m] for m in range(len(p)) if m != j])
            res.append(complex(k / d))
        return cls(float(corner_hz), tuple(complex(v) for v in p), tuple(res))

    def gain(self, s: float) -> float:
        """H(s) at a real s, e.g. H(-1/τ): the factor a filtered exponential's tail carries."""
        p = np.asarray(self.poles)
        r = np.asarray(self.residues)
        return float(np.real(np.sum(r / (s - p))))

    @property
    def delay_s(self) -> float:
        """DC group delay -H'(0) (s): 0.3364/fc for a 4-pole Bessel (METHODS §1.2)."""
        p = np.asarray(self.poles)
        r = np.asarray(self.residues)
        return float(np.real(np.sum(r / p ** 2)))


@dataclass(frozen=True)
class ExpFit:
    """One fitted model: I_ss·S(t) + Σ A_i·E_i(t) [+ Q_p·h(t)] through the filter.

    taus (s, fastest first) and amps (onset amplitudes, sign of the data); i_ss the steady
    state; q_p the charge of a component faster than the filter (pipette capacitance), 0.0 when
    not fitted; onset in samples relative to the first sample at the new level; access_se the
    standard error of I_ss + ΣA_i; sse and n_points of the (block-weighted) residual;
    amps_se the amplitudes' standard errors.
    """
    n: int
    taus: tuple[float, ...]
    amps: tuple[float, ...]
    i_ss: float
    q_p: float
    onset: float
    sse: float
    n_points: int
    n_params: int
    onset_current: float          # I_ss + ΣA_i
    onset_current_se: float
    charge: float                 # Σ A_i·τ_i (pipette charge excluded)
    charge_se: float
    converged: bool
    amps_se: tuple[float, ...] = ()


@dataclass(frozen=True)
class Selection:
    """The chosen model and why the larger ones were not taken (one short phrase each).

    fast_charge: charge (C) that arrives faster than the data resolve: the chosen fit's Q_p,
    or, when the next larger model fits significantly better with a component below the
    resolvable time constant, that component's charge plus that model's Q_p; fast_fit: the
    fit that describes it (see `fast_part`).
    """
    fit: ExpFit | None
    fits: tuple[ExpFit, ...]
    refused: tuple[str, ...]
    fast_charge: float = 0.0
    fast_fit: ExpFit | None = None


class _Problem:
    """Samples of one step on a compressed grid and the filter's basis functions on it.

    Sample j (0-based, ``lead`` samples before the first one at the new level) lies at
    t_j = (j - lead - onset)·dt after the onset. The first samples enter one by one, later
    ones as block means (weight √m for a block of m), which keeps long steps cheap; the block
    mean of exp(λt) is a geometric series, so the basis stays exact.
    """

    def __init__(self, y: np.ndarray, fs: float, lowpass: LowPass | None, *, lead: int,
                 head: int, corr: float = 1.0) -> None:
        self.dt = dt = 1.0 / fs
        self.lowpass = lowpass
        self.lead = lead
        n = len(y)
        starts, lens = [], []
        j = 0
        while j < n:
            m = 1 if j < head else max(1, int(_GROWTH * (j - lead)))
            m = min(m, n - j)
            starts.append(j)
            lens.append(m)
            j += m
        self.j0 = np.array(starts, dtype=float)
        self.m = np.array(lens, dtype=float)
        self.w = np.sqrt(self.m)
        self.y = np.add.reduceat(y, np.array(starts)) / self.m
        self.scale = float(np.max(np.abs(self.y))) or 1.0
        self.yw = self.w * self.y / self.scale
        # correlated (filtered) noise: standard errors from the residuals alone would be too
        # small by the square root of the noise's correlation factor
        self.corr = max(1.0, corr)
        # samples that may lie before the onset (onset <= _ONSET_RANGE[1])
        self.early = int(np.searchsorted(self.j0, lead + _ONSET_RANGE[1], side="right"))
        self.tj = (self.j0 - lead) * dt              # time from the first sample at the level
        if lowpass is not None:
            self.p = np.asarray(lowpass.poles)
            self.r = np.asarray(lowpass.residues)
            self.rp = self.r / self.p
            self.pole_base = np.exp(self.p[:, None] * self.tj) * self._ratio(self.p[:, None] * dt)

    def _ratio(self, x: np.ndarray) -> np.ndarray:
        """Mean of exp(x·k), k < m, over exp(0): (exp(m·x) - 1)/(m·(exp(x) - 1)); x != 0."""
        return np.expm1(self.m * x) / (self.m * np.expm1(x))

    def basis(self, taus: np.ndarray, onset: float, q_p: bool) -> np.ndarray:
        """Rows on the block grid: filtered step, filtered exponentials, [filter impulse]."""
        dt, e = self.dt, self.early
        a = 1.0 / np.asarray(taus, dtype=float)
        t0 = self.tj - onset * dt
        pos = np.ones_like(t0)
        pos[:e] = t0[:e] > 0
        ea = np.exp(np.outer(-a, t0)) * self._ratio((-a * dt)[:, None])
        ea[:, :e] *= pos[:e]
        if self.lowpass is None:
            return np.vstack([pos, ea])
        ep = self.pole_base * np.exp(-self.p * (onset * dt))[:, None]
        ep[:, :e] *= pos[:e]
        coef = np.empty((len(a) + 1 + q_p, len(self.p)), dtype=complex)
        coef[0] = self.rp
        coef[1:len(a) + 1] = self.r / (self.p + a[:, None])
        if q_p:
            coef[-1] = self.r
        rows = (coef @ ep).real
        rows[0] += pos
        h = (self.r / (-a[:, None] - self.p)).sum(axis=1).real
        rows[1:len(a) + 1] += h[:, None] * ea
        return rows

    def solve(self, taus, onset, q_p) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Residual, linear coefficients and weighted basis (columns) at given τ and onset."""
        b = self.basis(taus, onset, q_p) * self.w
        try:
            coef = np.linalg.solve(b @ b.T, b @ self.yw)
        except np.linalg.LinAlgError:
            coef = np.linalg.lstsq(b.T, self.yw, rcond=None)[0]
        b = b.T
        return self.yw - b @ coef, coef, b


def _fit(pb: _Problem, taus0, onset0: float, *, free_onset: bool, q_p: bool,
         tau_lo: float, tau_hi: float) -> ExpFit | None:
    n = len(taus0)
    # every parameter enters through tanh onto its range, so Levenberg-Marquardt needs no
    # bounds and a component that is not there stops at the range's edge
    lo = np.array([math.log(tau_lo)] * n + ([_ONSET_RANGE[0]] if free_onset else []))
    hi = np.array([math.log(tau_hi)] * n + ([_ONSET_RANGE[1]] if free_onset else []))
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    x0 = np.array([math.log(t) for t in taus0] + ([onset0] if free_onset else []))
    th0 = np.arctanh(np.clip((x0 - mid) / half, -0.999, 0.999))

    def split(th):
        x = mid + half * np.tanh(th)
        return np.exp(x[:n]), (float(x[n]) if free_onset else onset0)

    def resid(th):
        taus, onset = split(th)
        return pb.solve(taus, onset, q_p)[0]

    try:
        with np.errstate(all="ignore"):
            res = optimize.least_squares(resid, np.array(th0), method="lm", x_scale=1.0,
                                         xtol=1e-7, ftol=1e-9, max_nfev=15 * (n + 2))
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not np.all(np.isfinite(res.x)):
        return None
    taus, onset = split(res.x)
    r, coef, b = pb.solve(taus, onset, q_p)
    if not np.all(np.isfinite(coef)):
        return None
    order = np.argsort(taus)
    sse = float(r @ r)
    n_par = len(coef) + len(res.x)
    npts = len(r)
    # covariance of all parameters: Jacobian of the model in (log τ, onset) by differences,
    # and the linear columns; scaled to the residual variance
    jac = [b]
    x = np.array([math.log(t) for t in taus] + ([onset] if free_onset else []))
    for i in range(len(x)):
        x2 = x.copy()
        h = 1e-6
        x2[i] += h
        t2, o2 = np.exp(x2[:n]), (x2[n] if free_onset else onset0)
        jac.append(((pb.basis(t2, o2, q_p) * pb.w).T @ coef - b @ coef)[:, None] / h)
    jmat = np.hstack(jac)
    s2 = sse / max(npts - n_par, 1)
    try:
        cov = np.linalg.pinv(jmat.T @ jmat) * s2 * pb.corr
    except np.linalg.LinAlgError:
        cov = np.full((jmat.shape[1],) * 2, np.inf)
    k = len(coef)
    g = np.zeros(jmat.shape[1])
    g[:n + 1] = 1.0                        # I_ss + Σ A_i
    var_i0 = float(g @ cov @ g)
    # charge Σ A_i τ_i: derivative by A_i is τ_i, by log τ_i is A_i τ_i
    gq = np.zeros(jmat.shape[1])
    gq[1:n + 1] = taus
    gq[k:k + n] = coef[1:n + 1] * taus
    var_q = float(gq @ cov @ gq)
    s = pb.scale
    amps = coef[1:n + 1] * s
    return ExpFit(n=n, taus=tuple(float(taus[i]) for i in order),
                  amps=tuple(float(amps[i]) for i in order), i_ss=float(coef[0] * s),
                  q_p=float(coef[-1] * s) if q_p else 0.0, onset=float(onset), sse=sse * s * s,
                  n_points=npts, n_params=n_par,
                  onset_current=float((coef[0] + coef[1:n + 1].sum()) * s),
                  onset_current_se=math.sqrt(max(var_i0, 0.0)) * s,
                  charge=float(np.sum(amps * taus)), charge_se=math.sqrt(max(var_q, 0.0)) * s,
                  converged=bool(res.success),
                  amps_se=tuple(math.sqrt(max(float(cov[1 + i, 1 + i]), 0.0)) * s
                                for i in order))


def fast_part(fit: ExpFit, fs: float, lowpass: LowPass | None, n: int,
              tau_lo: float) -> np.ndarray:
    """What a fit's fast parts (Q_p·h(t) and components at or below ``tau_lo``) add to each of
    the ``n`` samples of its window (from LEAD samples before the onset), in A."""
    pb = _Problem(np.zeros(n), fs, lowpass, lead=LEAD, head=n)
    rows = pb.basis(np.array(fit.taus), fit.onset, bool(fit.q_p) and lowpass is not None)
    out = np.zeros(n)
    for i, (tau, amp) in enumerate(zip(fit.taus, fit.amps)):
        if tau <= tau_lo * 1.01:
            out += amp * rows[1 + i]
    if fit.q_p and lowpass is not None:
        out += fit.q_p * rows[-1]
    return out


def _seeds(pb: _Problem, n: int, onset: float, q_p: bool, tau_lo: float, tau_hi: float,
           prev: ExpFit | None) -> list[tuple[float, ...]]:
    """Starting time constants, best first by their linear least-squares residual: a
    log-spaced grid and the smaller model's constants with one more before, between or after
    them."""
    g = np.exp(np.linspace(math.log(tau_lo * 1.5), math.log(tau_hi / 1.5), 10 if n < 3 else 7))
    cands = list(itertools.combinations(g, n))
    if prev is not None:
        t = list(prev.taus)
        for extra in (t[0] / 5, t[-1] * 4, math.sqrt(t[0] * t[-1]) if len(t) > 1 else t[0] * 2):
            if tau_lo < extra < tau_hi:
                cands.append(tuple(sorted(t + [extra])))
    scored = []
    for combo in cands:
        r, _, _ = pb.solve(np.array(combo), onset, q_p)
        scored.append((float(r @ r), combo))
    scored.sort(key=lambda s: s[0])
    return [c for _, c in scored[:2]]


def fit_components(y: np.ndarray, fs: float, lowpass: LowPass | None, n: int, *,
                   taus0=None, onset0: float = -0.5, q_p: bool | None = None,
                   free_onset: bool | None = None, tau_lo: float | None = None,
                   tau_hi: float | None = None, head: int | None = None,
                   prev: ExpFit | None = None, noise_corr: float = 1.0) -> ExpFit | None:
    """Least-squares fit of ``n`` exponentials through the filter to one step response.

    Parameters
    ----------
    y : current relative to the holding level (A), from ``LEAD`` samples before the first
        sample at the new level to the end of the step.
    fs : sample rate (Hz).
    lowpass : the amplifier's filter, or None (samples taken as unfiltered).
    n : number of exponential components (1-3).
    taus0, onset0 : starting values (s; samples); without ``taus0`` a grid search.
    q_p : also fit a component faster than the filter (charge Q_p through the filter's
        impulse response: uncompensated pipette capacitance, METHODS §1.2 caution); default
        when a filter is given.
    free_onset : fit the onset within ±1.5 samples; default when the filter spreads the onset
        over more than one sample (its delay above half a sample), else the onset is taken
        half a sample before the first sample at the new level.
    noise_corr : the noise's correlation factor 1 + 2·Σρ_k (1 for white noise; about
        fs/(2·1.0464·fc) for white noise behind the filter); standard errors scale with its
        square root.

    Returns
    -------
    ExpFit, or None when the fit fails. Variable projection: the time constants and onset are
    found by scipy.optimize.least_squares; I_ss, A_i (and Q_p) by linear least squares.
    """
    dt = 1.0 / fs
    length = (len(y) - LEAD) * dt
    filt_t = lowpass.delay_s if lowpass is not None else 0.0
    if free_onset is None:
        free_onset = filt_t > 0.5 * dt
    if q_p is None:
        q_p = lowpass is not None and free_onset
    tau_lo = tau_lo or 0.25 * dt
    tau_hi = tau_hi or length / 2
    if head is None:
        head = LEAD + max(20, int(math.ceil(8 * filt_t * fs)))
    pb = _Problem(np.asarray(y, dtype=float), fs, lowpass, lead=LEAD, head=head,
                  corr=noise_corr)
    seeds = [tuple(taus0)] if taus0 is not None else _seeds(pb, n, onset0, q_p, tau_lo,
                                                            tau_hi, prev)
    best = None
    for s in seeds:
        f = _fit(pb, s, onset0, free_onset=free_onset, q_p=q_p, tau_lo=tau_lo, tau_hi=tau_hi)
        if f is not None and (best is None or f.sse < best.sse):
            best = f
        if best is not None and best.converged:
            break                        # the best-ranked start settled
    return best


def refusal(f: ExpFit, sign: float, tau_lo: float, tau_hi: float) -> str | None:
    """Why a fitted model is not a passive cell's transient, or None when it may be."""
    amps = np.asarray(f.amps) * sign
    if not f.converged and f.n > 1:
        return "did not converge"
    # the current of a passive RC network after a voltage step has only components of the
    # step's sign (Foster form of an RC driving-point admittance: positive residues)
    if np.any(amps <= 0):
        return "a component of the opposite sign (not a passive cell; the rise differs from " \
               "the filter model)"
    taus = np.asarray(f.taus)
    if taus[0] <= tau_lo * 1.01:
        return f"a component faster than the resolvable {tau_lo * 1e6:.3g} us"
    if taus[-1] >= tau_hi * 0.99:
        return "a component too slow for the step"
    if f.n > 1 and np.any(taus[1:] / taus[:-1] < _MIN_RATIO):
        return "time constants not distinct"
    total = float(np.sum(amps))
    q = float(np.sum(amps * taus))
    share = np.maximum(amps / total, amps * taus / q)
    if f.n > 1 and np.any(share < _MIN_SHARE):
        return "a component too small to matter"
    return None


def select_components(y: np.ndarray, fs: float, lowpass: LowPass | None, sign: float, *,
                      max_n: int = 3, tau_lo: float | None = None,
                      tau_hi: float | None = None, noise_floor: float = 0.0,
                      noise_corr: float = 1.0) -> Selection:
    """Fit 1..``max_n`` components and keep the largest model the data support.

    A model with one more component is taken when it passes an F-test at p < 0.001 against the
    smaller one (residual degrees of freedom divided by the noise's correlation factor
    ``noise_corr``), every component has the step's sign (a passive RC cell's current
    has only such components: Foster form of its admittance), its time constants are distinct
    (ratio >= 1.3) and inside the resolvable range, and every component carries >= 2% of the
    onset amplitude or of the charge. F-test for nested least-squares models: common practice.
    ``noise_floor`` (A) keeps noiseless data from making any rounding difference significant.
    """
    dt = 1.0 / fs
    length = (len(y) - LEAD) * dt
    tau_lo = tau_lo or 0.25 * dt
    tau_hi = tau_hi or length / 2
    corr = max(1.0, noise_corr)
    fits: list[ExpFit] = []
    refused: list[str] = []
    chosen = None
    prev = None
    unresolved = 0.0
    fast_fit = None

    def significant(f: ExpFit, base: ExpFit) -> float:
        dof = max(f.n_points - f.n_params, 1)
        s2 = max(f.sse / dof, noise_floor ** 2)
        d = max(base.sse - f.sse, 0.0) / (f.n_params - base.n_params)
        return float(fdtrc(f.n_params - base.n_params, max(dof / corr, 1.0), d / s2 / corr))

    for n in range(1, max_n + 1):
        f = fit_components(y, fs, lowpass, n, tau_lo=tau_lo, tau_hi=tau_hi, prev=prev,
                           noise_corr=corr)
        if f is None:
            refused.append(f"{n} components: the fit failed")
            break
        fits.append(f)
        prev = f
        why = refusal(f, sign, tau_lo, tau_hi)
        if why is not None:
            refused.append(f"{n} component{'s' if n > 1 else ''}: {why}")
            if chosen is not None:
                if (f.taus[0] <= tau_lo * 1.01 and f.amps[0] * sign > 0
                        and significant(f, chosen) < _F_TEST_P):
                    unresolved = f.amps[0] * f.taus[0] + f.q_p
                    fast_fit = f
                break                     # nested models: stop at the first one refused
            continue
        if chosen is None:
            chosen = f
            if math.sqrt(f.sse / f.n_points) < 0.5 * noise_floor:
                break                     # explained to well below the noise: nothing more
            continue
        p = significant(f, chosen)
        if p >= _F_TEST_P:
            refused.append(f"{n} components: no significant improvement (p = {p:.2g})")
            break
        chosen = f
    if fast_fit is None:
        fast_fit = chosen
        unresolved = chosen.q_p if chosen is not None else 0.0
    return Selection(chosen, tuple(fits), tuple(refused), float(unresolved), fast_fit)
