"""Recording -> FileMeasures (qcd.results): baseline windows, test-step source, one pass, notes.

Windows: gap-free files in 1 s blocks (events: block RMS > 3x median, left out and counted);
episodic files before the first command change (the spectrum also after the return to
holding). Test step from the protocol, else a recorded command, else the declared pulse.
``baseline_blocks`` gives one channel's baseline blocks as the spectrum takes them (compare).
Imports qcd.recording, qcd.measures, qcd.results, qcd.units, qcd.errors.
Over 500 lines: windows, blocks and test pulse share one pass; a split follows the measure work.
"""
from __future__ import annotations

import hashlib
import logging
import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from qcd import units
from qcd.errors import RecordingError
from qcd.measures import drift
from qcd.measures import noise as nz
from qcd.measures import spectrum as sp
from qcd.recording import open_recording
from qcd.results import ChannelMeasures, FileMeasures, Measure, Spectrum, display_unit

__all__ = ["analyze", "analyze_path", "Baseline", "baseline_blocks"]

log = logging.getLogger("qcd.analyze")


class _LazyTestPulse:
    """qcd.measures.testpulse, imported on first use (it pulls in scipy.optimize, which a
    gap-free scan never needs; start-up time counts when scanning thousands of files)."""

    def __getattr__(self, name: str) -> Any:
        from qcd.measures import testpulse
        return getattr(testpulse, name)


tp = _LazyTestPulse()

# ------------------------------------------------------------------------------ the analysis

_BLOCK_S = 1.0            # gap-free baseline blocks (DESIGN)
_MIN_BLOCK = 16           # fewer baseline samples than this per window: no noise measures
_MAX_HUM_DF = 2.0         # 50 and 60 Hz families need bins of at most 2 Hz to stay apart
_NO_COMMAND_FRACTION = 8  # no command known: the first 1/8 of each sweep is the baseline
_TP_SPREAD = 0.10         # a test pulse keeps its size within 10 % over the sweeps
_MEDIAN_SAMPLES = 512     # block medians from every k-th sample, k = L // 512 (speed)
_ABSURD_AMPERES = 1e-3    # |current| above 1 mA is no patch-clamp signal: the unit is wrong


class _Dims:
    """Per channel: SI dimension and the factor from stored values to SI."""

    def __init__(self, rec: Any, notes: list[str]) -> None:
        self.dim: list[str] = []
        self.factor: list[float] = []
        for ch in rec.channels:
            dim, factor = units.channel_quantity(ch.unit)
            if dim == "A" and factor == 1.0 and self._absurd_amperes(rec, ch):
                factor = 1e-12
                notes.append(f"channel {ch.index} says unit 'A' but holds values of "
                             f"picoampere size (absurd in amperes); measured as pA")
            self.dim.append(dim)
            self.factor.append(factor)

    @staticmethod
    def _absurd_amperes(rec: Any, ch: Any) -> bool:
        if ch.rails is not None and max(abs(ch.rails[0]), abs(ch.rails[1])) >= 1.0:
            return True
        n = min(rec.sweep_lengths[0] if rec.sweep_lengths else 0, 4096)
        if n <= 0:
            return False
        first = next(rec.chunks(ch.index, 0 if rec.n_sweeps else None, size=n, stop=n), None)
        return first is not None and len(first) > 0 and \
            float(np.median(np.abs(first))) > _ABSURD_AMPERES


def _mode(rec: Any, dims: _Dims) -> tuple[str, int | None]:
    """(mode, primary channel): from paired command/input units, else from the input units."""
    for k in sorted(rec.commands):
        cmd = rec.commands[k]
        if not cmd.enabled or k >= len(rec.channels):
            continue
        cdim, _ = units.channel_quantity(cmd.unit)
        if dims.dim[k] == "A" and cdim == "V":
            return "voltage_clamp", k
        if dims.dim[k] == "V" and cdim == "A":
            return "current_clamp", k
    d = dims.dim
    if not d:
        return "unknown", None
    if d[0] == "A":
        return "voltage_clamp", 0
    if d[0] == "V":
        return ("current_clamp", 0) if "A" in d else ("extracellular", 0)
    for want, mode in (("A", "voltage_clamp"), ("V", "extracellular")):
        if want in d:
            return mode, d.index(want)
    return "unknown", None


def _protocol_span(rec: Any, sweep: int) -> tuple[int, int | None] | None:
    """(first change, return to the starting level or None) over the enabled commands."""
    first, back, any_cmd = None, 0, False
    for cmd in rec.commands.values():
        if not cmd.enabled:
            continue
        segs = [s for s in cmd.levels(sweep) if s.stop > s.start]
        if not segs:
            continue
        any_cmd = True
        level0 = segs[0].level
        quiet = [s.level == level0 and s.kind in ("holding", "step") for s in segs]
        if all(quiet):
            continue
        i = quiet.index(False)
        first = segs[i].start if first is None else min(first, segs[i].start)
        j = len(segs)
        while j > 0 and quiet[j - 1]:
            j -= 1
        if j == len(segs):
            back = None                # ends away from its starting level: no holding tail
        elif back is not None:
            back = max(back, segs[j].start)
    if not any_cmd:
        return None
    if first is None:
        return (rec.sweep_lengths[sweep], None)
    return first, back


def _recorded_span(y: np.ndarray) -> tuple[int, int | None] | None:
    """(first departure, last return) of a recorded command from its starting level."""
    if len(y) < 8:
        return None
    d = np.diff(y)
    sd = nz.MAD_SCALE * float(np.median(np.abs(d - np.median(d)))) / math.sqrt(2.0)
    hold = float(np.median(y[:max(3, min(len(y) // 20, 50))]))
    scale = float(np.max(np.abs(y))) or 1.0
    away = np.abs(y - hold) > max(6.0 * sd, 1e-6 * scale)
    idx = np.flatnonzero(away)
    if not len(idx):
        return None
    last = int(idx[-1]) + 1
    return int(idx[0]), (last if last < len(y) else None)


_SETTLE_S = 0.1           # after the command returns to holding, wait 100 ms ...
_SETTLE_FRACTION = 0.25   # ... or a quarter of the stimulated stretch, whichever is longer


def _baseline_windows(rec: Any, dims: "_Dims", mode: str, primary: int | None,
                      plans: list["_StepPlan"], notes: list[str]) -> list[list[tuple[int, int]]]:
    """Per sweep, the stretches at the holding level: before the first command change, and
    after the command is back at its starting level plus a settling time (max(100 ms, 1/4 of
    the stimulated stretch)). Without any command known: a single sweep is all baseline, and
    otherwise the first 1/8 of each sweep."""
    want = {"voltage_clamp": "V", "current_clamp": "A"}.get(mode)
    rec_ch = None
    if not any(c.enabled for c in rec.commands.values()) and want and primary is not None:
        rec_ch = next((c for c in range(len(rec.channels))
                       if c != primary and dims.dim[c] == want), None)
    out: list[list[tuple[int, int]]] = []
    fallback = used_recorded = False
    for k, n in enumerate(rec.sweep_lengths):
        span = _protocol_span(rec, k)
        if span is None and rec_ch is not None:
            span = _recorded_span(rec.sweep(rec_ch, k))
            if span is None:
                span = (n, None)
            used_recorded = True
        for plan in plans:
            s = plan.steps[k] if k < len(plan.steps) else None
            if s is not None:
                if span is None:
                    span = (s.start, s.stop)
                else:
                    first = min(span[0], s.start)
                    back = None if span[1] is None else max(span[1], s.stop)
                    span = (first, back)
        if span is None:
            if rec.n_sweeps == 1:
                out.append([(0, n)])
            else:
                out.append([(0, n // _NO_COMMAND_FRACTION)])
                fallback = True
            continue
        first, back = span
        wins = [(0, min(first, n))]
        if back is not None and first < n:
            settle = max(int(_SETTLE_S * rec.fs), int(_SETTLE_FRACTION * (back - first)))
            if back + settle < n:
                wins.append((back + settle, n))
        out.append(wins)
    if fallback:
        notes.append(f"no command known: the baseline is the first 1/{_NO_COMMAND_FRACTION} "
                     f"of each sweep")
    if used_recorded:
        notes.append(f"baseline windows from the recorded command (channel {rec_ch})")
    return out


class _StepPlan:
    """The test step of each sweep for one channel, where it came from, and why not."""

    def __init__(self) -> None:
        self.steps: list[Any] = []
        self.source = ""
        self.reason = ""

    @property
    def ok(self) -> bool:
        return any(s is not None for s in self.steps)


def _protocol_steps(rec: Any, ch: int, want_dim: str) -> list[Any] | None:
    cmd = rec.commands.get(ch)
    if cmd is None or not cmd.enabled:
        return None
    cdim, factor = units.channel_quantity(cmd.unit)
    if cdim != want_dim:
        return None
    return [tp.find_step(cmd.waveform(k) * factor, rec.fs) for k in range(rec.n_sweeps)]


def _recorded_steps(rec: Any, dims: _Dims, primary: int, want_dim: str) -> tuple[list, int] | None:
    for c in range(len(rec.channels)):
        if c != primary and dims.dim[c] == want_dim:
            steps = [tp.find_step(rec.sweep(c, k) * dims.factor[c], rec.fs)
                     for k in range(rec.n_sweeps)]
            if any(s is not None for s in steps):
                return steps, c
    return None


def _plan_steps(rec: Any, dims: _Dims, mode: str, ch: int, primary: int | None,
                pulse: Any) -> _StepPlan:
    plan = _StepPlan()
    if mode not in ("voltage_clamp", "current_clamp"):
        plan.reason = "no test-pulse measures in this recording mode"
        return plan
    if rec.gap_free:
        plan.reason = "gap-free recording: no sweeps, so no test step"
        return plan
    want = "V" if mode == "voltage_clamp" else "A"
    proto = _protocol_steps(rec, ch, want)
    if proto is not None and any(s is not None for s in proto):
        plan.steps, plan.source = proto, "protocol"
    elif ch == primary:
        found = _recorded_steps(rec, dims, primary, want)
        if found is not None:
            plan.steps, plan.source = found[0], f"recorded command (channel {found[1]})"
        elif pulse is not None:
            a = int(round(pulse.start_s * rec.fs))
            b = int(round((pulse.start_s + pulse.length_s) * rec.fs))
            amp = pulse.amplitude_si(mode)
            plan.steps = [tp.StepWindow(a, b, amp) if b <= n else None
                          for n in rec.sweep_lengths]
            plan.source = "declared pulse"
            if not plan.ok:
                plan.reason = "the declared pulse ends after the end of every sweep"
                return plan
    if not plan.ok:
        plan.steps = [None] * rec.n_sweeps
        plan.reason = plan.reason or (
            "no test step: the protocol has no clean step that returns to holding, no "
            "recorded command shows one, and no pulse was declared (--pulse)"
            if ch == primary else "no test step for this channel in the protocol")
        return plan
    amps = np.array([s.amplitude for s in plan.steps if s is not None])
    if mode == "voltage_clamp" and len(amps) > 1:
        spread = float(amps.max() - amps.min())
        if spread > _TP_SPREAD * float(np.median(np.abs(amps))):
            plan.reason = (f"the step size changes from sweep to sweep ({amps.min() * 1e3:g} to "
                           f"{amps.max() * 1e3:g} mV, a step family): not a test pulse")
            plan.steps = [None] * rec.n_sweeps
    return plan


class _Blocks:
    """Accumulates baseline blocks of L samples: per-block noise values and the Welch sum.

    Blocks arrive in any linear unit (raw converter counts on the gap-free path); ``scale`` and
    ``offset`` turn results into SI. ``rails`` (same unit as the blocks) count clipped samples.
    """

    def __init__(self, L: int, fs: float, scale: float = 1.0, offset: float = 0.0,
                 rails: tuple[float, float] | None = None) -> None:
        self.L, self.fs = L, fs
        self.scale, self.offset, self.rails = scale, offset, rails
        self.welch = sp.WelchAccumulator(L, fs)
        self.fft = sp.BlockFFT(L)
        self.clipped = 0
        self.nonfinite = 0                # blocks left out for NaN/inf samples
        self.humfit: sp.HumFit | None = None   # short windows with a declared mains_hz
        self._median_step = max(1, L // _MEDIAN_SAMPLES)
        self.parts: dict[str, list[np.ndarray]] = {k: [] for k in
                                                   ("sd", "sd_band", "pp", "mean", "median", "t")}

    def add(self, blocks: np.ndarray, t0: np.ndarray) -> None:
        """Add (n, L) blocks: float64 (detrended in place) or raw integer counts."""
        _, mx, mn = nz.peak_to_peak(blocks)
        if self.rails is not None:
            lo, hi = self.rails
            for i in np.flatnonzero((mx >= hi) | (mn <= lo)):
                self.clipped += nz.clipping_count(blocks[i], self.rails)
        finite = np.isfinite(mx) & np.isfinite(mn)      # float files may hold NaN/inf samples
        if not finite.all():
            self.nonfinite += int((~finite).sum())
            blocks, t0 = blocks[finite], t0[finite]
            if not len(blocks):
                return
        sub = blocks[:, ::self._median_step]
        h = sub.shape[1] // 2
        if sub.shape[1] % 2:
            med = np.partition(sub, h, axis=1)[:, h].astype(float)   # a copy, no view kept
        else:
            part = np.partition(sub, (h - 1, h), axis=1)
            med = 0.5 * (part[:, h - 1].astype(float) + part[:, h])
        # spectra in groups of rows small enough (~2 MB) to stay in cache across the passes
        g = max(1, (1 << 21) // (8 * self.L))
        for a in range(0, blocks.shape[0], g):
            X, mean, _ = self.fft(blocks[a:a + g])
            if self.humfit is not None:
                self.humfit.add(self.fft.detrended)
            pp, _, _ = nz.peak_to_peak(self.fft.detrended)     # still in cache
            sd, sd_band = nz.parseval_sd(X, self.L, self.fs)
            self.welch.add(X, sd)
            for k, v in (("sd", sd), ("sd_band", sd_band), ("mean", mean), ("pp", pp)):
                self.parts[k].append(v)
        for k, v in (("median", med), ("t", t0)):
            self.parts[k].append(v)

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
        P, n = self.welch.psd(exclude)
        return P * self.scale ** 2, n


class _TestPulse:
    """Per-sweep test-pulse results of one channel and a running average of its sweeps."""

    def __init__(self, mode: str, plan: _StepPlan, ch: Any, factor: float) -> None:
        self.mode, self.plan, self.ch = mode, plan, ch
        self.rails = None if ch.rails is None else (ch.rails[0] * factor, ch.rails[1] * factor)
        self.results: list[Any] = []
        self.sum: np.ndarray | None = None
        self.n_sum = 0
        self.avg_step = None
        self.same_length = True

    def add(self, k: int, x: np.ndarray) -> None:
        step = self.plan.steps[k]
        if step is None:
            return
        fs = self.fs
        if self.mode == "voltage_clamp":
            self.results.append((k, tp.try_whole_cell(x, fs, step, filter_hz=self.ch.filter_hz,
                                                      rails=self.rails)))
        else:
            if step.amplitude < 0:
                self.results.append((k, tp.input_resistance(x, fs, step,
                                                            filter_hz=self.ch.filter_hz)))
            return
        if self.avg_step is None:
            self.avg_step = step
        if (self.sum is not None and len(x) != len(self.sum)) or step != self.avg_step:
            self.same_length = False
            return
        self.sum = x.copy() if self.sum is None else self.sum + x
        self.n_sum += 1

    fs = 0.0


def _put(out: dict[str, Measure], name: str, value_si: float | None, dim: str) -> None:
    if value_si is None or not np.isfinite(value_si):
        return
    unit = display_unit(name, dim) if dim in units.DISPLAY else ""
    value = units.from_si(value_si, unit) if dim not in ("", "%") else float(value_si)
    out[name] = Measure(name, float(value), unit)


def _tp_measures(t: _TestPulse, out: dict[str, Measure], notes: list[str]) -> None:
    if t.mode == "current_clamp":
        vals = [r.input_resistance for _, r in t.results if r is not None]
        if vals:
            _put(out, "input_resistance", float(np.median(vals)), "Ohm")
        elif t.results:
            notes.append("input_resistance: no hyperpolarising step gave a steady response")
        else:
            notes.append("input_resistance: no hyperpolarising current step in the sweeps")
        return
    cells = [(k, r) for k, r in t.results if isinstance(r, tp.WholeCell)]
    if cells and len(cells) * 2 >= len(t.results):
        for name in ("access_resistance", "membrane_resistance", "membrane_capacitance", "tau"):
            dim = {"access_resistance": "Ohm", "membrane_resistance": "Ohm",
                   "membrane_capacitance": "F", "tau": "s"}[name]
            _put(out, name, float(np.median([getattr(r, name) for _, r in cells])), dim)
        ra = [r.access_resistance for _, r in cells]
        if len(ra) >= 2:
            g = max(1, min(3, len(ra) // 3))
            try:
                _put(out, "access_change_pct", tp.access_change_pct(ra[:g], ra[-g:]), "%")
            except ValueError as e:
                notes.append(f"access_change_pct: {e}")
        return
    if t.sum is None or not t.same_length:
        reasons = sorted({r.reason for _, r in t.results if isinstance(r, tp.Rejected)})
        notes.append("no whole-cell transient in the test step" +
                     (f" ({reasons[0]})" if reasons else ""))
        return
    avg = t.sum / t.n_sum
    kind = tp.classify(avg, t.fs, t.avg_step, filter_hz=t.ch.filter_hz, rails=t.rails)
    if kind == "whole_cell":
        r = tp.try_whole_cell(avg, t.fs, t.avg_step, filter_hz=t.ch.filter_hz, rails=t.rails)
        if isinstance(r, tp.WholeCell):
            for name, dim in (("access_resistance", "Ohm"), ("membrane_resistance", "Ohm"),
                              ("membrane_capacitance", "F"), ("tau", "s")):
                _put(out, name, getattr(r, name), dim)
            notes.append(f"whole-cell values from the average of {t.n_sum} sweeps")
    elif kind == "seal":
        _put(out, "seal_resistance", tp.seal_resistance(avg, t.fs, t.avg_step), "Ohm")
        notes.append(f"no membrane transient: seal resistance from the average of {t.n_sum} "
                     f"sweeps")
    elif kind == "open_pipette":
        r = tp.seal_resistance(avg, t.fs, t.avg_step)
        notes.append(f"the step response is an open pipette ({r / 1e6:.3g} MOhm): no seal, no "
                     f"cell")
    else:
        notes.append("the test step gives no resolvable current response (no cell, no seal)")


def _spectral(acc: _Blocks, keep_events: np.ndarray, fs: float, dim: str,
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
    if df <= _MAX_HUM_DF and fs / 2 > 75.0:
        h = sp.hum(freqs, psd, k_segments=k_seg, mains_hz=mains_hz)
        if h is None:
            notes.append("no mains line stands out of the noise (50/60 Hz family test)")
        else:
            line = h.line_hz
            out["line_hz"] = Measure("line_hz", round(h.line_hz, 2), "Hz")
            _put(out, "hum_rms", math.sqrt(h.power), dim)
            _put(out, "hum_fundamental_rms", math.sqrt(h.fundamental_power), dim)
            if var > 0:
                out["hum_fraction"] = Measure("hum_fraction", h.power / var, "")
    elif acc.humfit is not None and acc.humfit.count:
        p = acc.humfit.powers() * acc.scale ** 2
        _put(out, "hum_rms", math.sqrt(float(p.sum())), dim)
        _put(out, "hum_fundamental_rms", math.sqrt(float(p[0])), dim)
        if var > 0:
            out["hum_fraction"] = Measure("hum_fraction", float(p.sum()) / var, "")
        notes.append(f"hum fitted at the declared mains {acc.humfit.line_hz:g} Hz by least "
                     f"squares in {acc.humfit.count} windows of {L / fs * 1e3:.4g} ms (too "
                     f"short for the PSD to resolve the line; line_hz not measured)")
    else:
        more = "" if mains_hz else "; declare the rig's mains_hz (or --mains) to fit it"
        notes.append(f"hum not measured: baseline windows of {L / fs * 1e3:.4g} ms give "
                     f"{df:.3g} Hz bins (needs <= {_MAX_HUM_DF:g} Hz){more}")
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
        _put(out, name, sp.band_rms(freqs, psd, lo, min(top, fs / 2), line), dim)
    lines = sp.spectral_lines(freqs, psd, k_segments=k_seg, line_hz=line or mains_hz)
    unit = display_unit("noise_rms", dim) if dim else ""
    f = 1.0 / units.FACTORS[unit] if dim else 1.0
    out["spectral_lines"] = Measure("spectral_lines",
                                    tuple((round(fq, 3), r * f) for fq, r in lines), unit)
    cf, cd = sp.compact_spectrum(freqs, psd)
    return Spectrum(tuple(float(v) for v in cf), tuple(float(v) * f * f for v in cd), unit)


def _channel(rec: Any, c: int, dims: _Dims, mode: str, plan: _StepPlan | None,
             windows: list[list[tuple[int, int]]], mains_hz: float | None, chunk: int
             ) -> ChannelMeasures:
    ch = rec.channels[c]
    dim, factor = dims.dim[c], dims.factor[c]
    fs = rec.fs
    notes: list[str] = []
    out: dict[str, Measure] = {}
    n_total = clipped = 0
    rails = ch.rails
    tpr = None
    if plan is not None and plan.ok:
        tpr = _TestPulse(mode, plan, ch, factor)
        tpr.fs = fs
    if rec.gap_free:
        L = max(1, min(int(round(fs * _BLOCK_S)), rec.n_samples))
        gain, offset = ch.gain, ch.offset
        raw_rails = None
        if rails is not None and gain != 0:
            raw_rails = tuple(sorted(((rails[0] - offset) / gain, (rails[1] - offset) / gain)))
        acc = _Blocks(L, fs, gain * factor, offset * factor, raw_rails) \
            if L >= _MIN_BLOCK else None
        acc_s = acc
    else:
        # time-domain noise from the pre-step windows (DESIGN); the spectrum from every
        # stretch at holding, so a long holding tail gives the resolution hum needs
        one_s = int(round(fs * _BLOCK_S))
        pre = [w[0][1] - w[0][0] for w in windows if w]
        usable = [n for n in pre if n >= _MIN_BLOCK]
        L = min([one_s] + usable) if usable else 0
        L2 = min(one_s, max((b - a for w in windows for a, b in w), default=0))
        acc = _Blocks(L, fs) if L >= _MIN_BLOCK else None
        same = L2 == L and all(len(w) == 1 for w in windows)
        acc_s = acc if same else (_Blocks(L2, fs) if L2 >= _MIN_BLOCK else None)
        if (acc_s is not None and mains_hz and fs / acc_s.L > _MAX_HUM_DF
                and sp.HumFit.fits(acc_s.L, fs, mains_hz)):
            acc_s.humfit = sp.HumFit(acc_s.L, fs, mains_hz)
    if rec.gap_free:
        # raw converter counts in chunks of whole blocks; gain, offset and the SI factor are
        # applied to the results (every measure is linear in the samples or offset-free)
        size = max(L, chunk // max(L, 1) * max(L, 1))
        left = None
        done = 0
        for x in rec.raw_chunks(c, None, size=size):
            n_total += len(x)
            if acc is None:
                clipped += nz.clipping_count(x * ch.gain + ch.offset, rails)
                continue
            if left is not None and len(left):
                x = np.concatenate((left, x))
            nb = len(x) // L
            if nb:
                t0 = (done + np.arange(nb) * L + L / 2) / fs
                left = x[nb * L:].copy()
                acc.add(x[:nb * L].reshape(nb, L), t0)
                done += nb * L
            else:
                left = x
        if acc is not None:
            clipped += acc.clipped
            if left is not None and len(left):
                clipped += nz.clipping_count(left * ch.gain + ch.offset, rails)
    else:
        for k in range(rec.n_sweeps):
            x = rec.sweep(c, k)
            n_total += len(x)
            clipped += nz.clipping_count(x, rails)
            xs = x * factor
            if tpr is not None:
                tpr.add(k, xs)
            t_k = rec.sweep_starts_s[k]
            for target, wins in ((acc, windows[k][:1]),
                                 (None if acc_s is acc else acc_s, windows[k])):
                if target is None:
                    continue
                n_l = target.L
                for a, b in wins:
                    nb = (b - a) // n_l
                    if nb:
                        t0 = t_k + (a + np.arange(nb) * n_l + n_l / 2) / fs
                        target.add(xs[a:a + nb * n_l].reshape(nb, n_l).copy(), t0)
    spectrum = None
    for a_ in {id(acc): acc, id(acc_s): acc_s}.values():
        if a_ is not None and a_.nonfinite:
            notes.append(f"{a_.nonfinite} baseline windows hold NaN or infinite samples and "
                         f"were left out")
    if acc is None or not acc.parts["sd"]:
        notes.append("no baseline window long enough for noise measures "
                     f"(need {_MIN_BLOCK} samples at the holding level)")
    else:
        a = acc.arrays()
        events = nz.event_blocks(a["sd"])
        keep = ~events
        if rec.gap_free or len(a["sd"]) >= 3:
            out["event_blocks"] = Measure("event_blocks", int(events.sum()), "")
        _put(out, "noise_rms", float(np.median(a["sd"][keep])), dim)
        _put(out, "noise_rms_1k", float(np.median(a["sd_band"][keep])), dim)
        if fs / 2 <= 1000.0:
            notes.append(f"noise_rms_1k: the file's bandwidth ({fs / 2:g} Hz Nyquist) is "
                         f"already below 1 kHz")
        pp = float(np.median(a["pp"][keep]))
        _put(out, "noise_pp", pp, dim)
        rms = float(np.median(a["sd"][keep]))
        if rms > 0:
            out["pp_over_rms"] = Measure("pp_over_rms", pp / rms, "")
        _put(out, "holding", float(np.mean(a["mean"][keep])), dim)
        slope = drift.baseline_drift(a["t"][keep], a["median"][keep])
        if slope is not None:
            _put(out, "baseline_drift", slope, {"A": "A/s", "V": "V/s"}.get(dim, ""))
        else:
            notes.append("baseline_drift: baseline spans less than 1 s or fewer than 3 windows")
    if acc_s is not None and acc_s.parts["sd"]:
        s_events = nz.event_blocks(np.concatenate(acc_s.parts["sd"]))
        spectrum = _spectral(acc_s, s_events, fs, dim, mains_hz, out, notes)
    if rails is not None and n_total:
        out["clipping_fraction"] = Measure("clipping_fraction", clipped / n_total, "")
    elif rails is None:
        notes.append("clipping_fraction: converter rails unknown (float samples)")
    if tpr is not None:
        notes.append(f"test step from the {plan.source}")
        _tp_measures(tpr, out, notes)
    elif plan is not None and plan.reason:
        notes.append(plan.reason)
    return ChannelMeasures(ch.index, ch.name, ch.unit.replace("\x00", "").strip() or "?",
                           dim, out, tuple(notes), spectrum)


def _plan(rec: Any, pulse: Any, notes: list[str]
          ) -> tuple[_Dims, str, int | None, dict[int, _StepPlan], list[list[tuple[int, int]]]]:
    """(dimensions, mode, primary channel, test-step plans, baseline windows per sweep)."""
    dims = _Dims(rec, notes)
    mode, primary = _mode(rec, dims)
    want = {"voltage_clamp": "A", "current_clamp": "V"}.get(mode)
    plans: dict[int, _StepPlan] = {}
    if want is not None:
        for c in range(len(rec.channels)):
            if dims.dim[c] == want and (c == primary or c in rec.commands):
                plans[c] = _plan_steps(rec, dims, mode, c, primary, pulse)
    windows = [] if rec.gap_free else _baseline_windows(rec, dims, mode, primary,
                                                        list(plans.values()), notes)
    return dims, mode, primary, plans, windows


def analyze(recording: Any, *, pulse: Any = None, mains_hz: float | None = None,
            chunk_size: int = 1 << 20) -> FileMeasures:
    """Measure an open Recording (one pass over its samples).

    ``pulse`` (qcd.config.TestPulse) is used when neither the protocol nor a recorded command
    shows a test step; ``mains_hz`` (50/60) skips the 50-vs-60 detection; ``chunk_size`` is
    the reader's chunk length for gap-free files (results do not depend on it).
    """
    rec = recording
    notes: list[str] = list(rec.notes)
    dims, mode, primary, plans, windows = _plan(rec, pulse, notes)
    channels = tuple(_channel(rec, c, dims, mode, plans.get(c), windows, mains_hz, chunk_size)
                     for c in range(len(rec.channels)))
    return FileMeasures(
        path=str(rec.path), status="ok", mode=mode, format=rec.format, fs_hz=float(rec.fs),
        duration_s=float(rec.duration_s), n_sweeps=int(rec.n_sweeps),
        gap_free=bool(rec.gap_free), recorded_at=rec.recorded_at, channels=channels,
        notes=tuple(notes), extra={"primary_channel": primary})


def _file_facts(p: Path, digest: bool) -> dict[str, Any]:
    facts: dict[str, Any] = {}
    try:
        st = p.stat()
        facts.update(size=int(st.st_size), mtime=float(st.st_mtime))
        if digest and p.is_file():
            h = hashlib.sha256()
            with open(p, "rb") as f:
                for block in iter(lambda: f.read(1 << 22), b""):
                    h.update(block)
            facts["sha256"] = h.hexdigest()
    except OSError:
        pass
    return facts


def analyze_path(path: Any, *, pulse: Any = None, mains_hz: float | None = None,
                 digest: bool = True, chunk_size: int = 1 << 20) -> FileMeasures:
    """Open, measure and close one file. Never raises for a bad file: status 'error' instead.

    ``digest`` computes the file's sha256 (for the store's duplicate check); ``qcd scan``
    without ``--store`` skips it.
    """
    p = Path(path)
    facts = _file_facts(p, digest)
    try:
        with open_recording(p) as rec:
            fm = analyze(rec, pulse=pulse, mains_hz=mains_hz, chunk_size=chunk_size)
    except RecordingError as e:
        return FileMeasures(path=str(p), status="error", error=str(e), error_kind=e.kind,
                            **facts)
    except MemoryError as e:
        return FileMeasures(path=str(p), status="error", error_kind="internal",
                            error=f"{p}: out of memory while measuring ({e})", **facts)
    except Exception as e:  # a bug in qcd: logged with its traceback, stored as 'internal'
        log.exception("internal error while measuring %s", p)
        return FileMeasures(path=str(p), status="error", error_kind="internal",
                            error=f"{p}: internal error while measuring "
                                  f"({type(e).__name__}: {e})", **facts)
    return replace(fm, **facts)


@dataclass(frozen=True)
class Baseline:
    """One channel's baseline as blocks of equal length: the stretches analyze takes its
    spectrum from (gap-free: 1 s blocks; episodic: the windows at the holding level), blocks
    that hold events left out."""
    fs: float
    dimension: str                   # 'A', 'V' or '' (qcd.units.channel_quantity)
    unit: str                        # the blocks' unit: the display unit, else the channel's
    blocks: np.ndarray               # (n, L)
    events: int                      # blocks left out because they hold events
    notes: tuple[str, ...] = ()


def baseline_blocks(rec: Any, channel: int, *, pulse: Any = None,
                    max_blocks: int | None = None) -> Baseline:
    """The baseline blocks of one channel of an open Recording, in its display unit.

    The windows and block length are analyze's own (``pulse`` as for ``analyze``); at most
    ``max_blocks`` blocks are read from a gap-free file, so a long file is not read whole.
    """
    notes: list[str] = []
    dims, _, _, _, windows = _plan(rec, pulse, notes)
    dim, factor = dims.dim[channel], dims.factor[channel]
    unit = units.DISPLAY[dim] if dim else (rec.channels[channel].unit.replace("\x00", "").strip())
    scale = factor / units.FACTORS[unit] if dim else 1.0
    fs = rec.fs
    rows: list[np.ndarray] = []
    if rec.gap_free:
        L = max(1, min(int(round(fs * _BLOCK_S)), rec.n_samples))
        left = np.empty(0)
        for x in rec.chunks(channel, None, size=max(L, (1 << 20) // L * L)):
            x = np.concatenate((left, x)) if len(left) else x
            nb = len(x) // L
            if max_blocks is not None:
                nb = min(nb, max_blocks - sum(len(r) for r in rows))
            rows.append(x[:nb * L].reshape(nb, L))
            left = x[nb * L:]
            if max_blocks is not None and sum(len(r) for r in rows) >= max_blocks:
                break
    else:
        L = min(int(round(fs * _BLOCK_S)), max((b - a for w in windows for a, b in w), default=0))
        for k, wins in enumerate(windows):
            x = rec.sweep(channel, k) if L >= _MIN_BLOCK else np.empty(0)
            for a, b in wins:
                nb = (b - a) // L if L >= _MIN_BLOCK else 0
                if nb:
                    rows.append(x[a:a + nb * L].reshape(nb, L))
    blocks = np.concatenate(rows) * scale if rows else np.empty((0, max(L, 0)))
    blocks = blocks[np.isfinite(blocks).all(axis=1)]
    events = 0
    if len(blocks):
        X, _, _ = sp.block_fft(blocks)
        sd, _ = nz.parseval_sd(X, blocks.shape[1], fs)
        keep = ~nz.event_blocks(sd)
        events = int((~keep).sum())
        blocks = blocks[keep]
    return Baseline(float(fs), dim, unit, blocks, events, tuple(notes))

