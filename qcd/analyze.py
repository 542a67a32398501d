"""Recording -> FileMeasures (qcd.results): baseline windows, test-step source, one pass, notes.

Windows: gap-free files in 1 s blocks (events: block RMS > 3x median, left out and counted);
episodic files before the first command change (the spectrum also after the return to
holding). Test step from the protocol, else a recorded command, else the declared pulse.
``baseline_blocks`` gives one channel's baseline blocks as the spectrum takes them (compare).
Imports qcd.recording, qcd.measures, qcd.results, qcd.units, qcd.errors.
Over 500 lines: windows, blocks and test pulse share one pass; a split follows the measure work.
"""
from __future__ import annotations

import collections
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
from qcd.measures import humfit, mains, zoom
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
# A gap-free file of at least this many samples (all channels) has its integer samples
# transformed in float32 through scipy.fft, whose import (~0.2 s CPU) the faster passes repay
# (measured: about 2 ns less per sample, so from about 1e8 samples on).
_SINGLE_MIN_SAMPLES = 1 << 27
_KEEP_BYTES = 40_000_000  # loudest block spectra kept per file (events taken out of the PSD),
                          # shared by its channels so that many channels stay in bounded memory


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


def _mode(rec: Any, dims: _Dims, notes: list[str], *, declared: str | None = None,
          pulse: Any = None) -> tuple[str, int | None]:
    """(mode, primary channel): from paired command/input units; else the rig's declared
    mode; else from the input units, where a declared test step on a voltage input means
    current clamp (a current step drives it) and on a current input voltage clamp."""
    for k in sorted(rec.commands):
        cmd = rec.commands[k]
        if not cmd.enabled or k >= len(rec.channels):
            continue
        cdim, _ = units.channel_quantity(cmd.unit)
        # current input with a voltage command: voltage clamp; the other way: current clamp
        found = {"AV": "voltage_clamp", "VA": "current_clamp"}.get(dims.dim[k] + cdim)
        if found is not None:
            if declared and declared != found:
                notes.append(f"the rig declares {declared}, but the header pairs input channel "
                             f"{k} with a command in {cmd.unit}: measured as {found}")
            return found, k
    d = dims.dim
    if declared:
        want = "A" if declared == "voltage_clamp" else "V"
        if want in d:
            return declared, d.index(want)
        notes.append(f"the rig declares {declared}, but no input channel is in "
                     f"{'amperes' if want == 'A' else 'volts'}")
    if not d:
        return "unknown", None
    if d[0] == "A":
        return "voltage_clamp", 0
    if d[0] == "V":
        if "A" in d:
            return "current_clamp", 0
        if pulse is not None:
            notes.append("a declared test step on a voltage input without a command channel: "
                         "measured as current clamp (the step is a current in pA)")
            return "current_clamp", 0
        return "extracellular", 0
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


# A voltage step still at its level when the sweep ends is a test step up to this size (test
# pulses are a few mV, common practice); a larger lasting change is a new holding level.
_OPEN_STEP_MAX_V = 20e-3


def _open_max(want_dim: str) -> float | None:
    """Largest step that may last to the end of a sweep and still be a test step (SI)."""
    return _OPEN_STEP_MAX_V if want_dim == "V" else None


def _protocol_steps(rec: Any, ch: int, want_dim: str) -> list[Any] | None:
    cmd = rec.commands.get(ch)
    if cmd is None or not cmd.enabled:
        return None
    cdim, factor = units.channel_quantity(cmd.unit)
    if cdim != want_dim:
        return None
    return [tp.find_step(cmd.waveform(k) * factor, rec.fs, open_max=_open_max(want_dim))
            for k in range(rec.n_sweeps)]


def _recorded_steps(rec: Any, dims: _Dims, primary: int, want_dim: str) -> tuple[list, int] | None:
    for c in range(len(rec.channels)):
        if c != primary and dims.dim[c] == want_dim:
            steps = [tp.find_step(rec.sweep(c, k) * dims.factor[c], rec.fs,
                                  open_max=_open_max(want_dim))
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
                 rails: tuple[float, float] | None = None, *,
                 keep_bytes: int = _KEEP_BYTES, single: bool = False) -> None:
        self.L, self.fs = L, fs
        self.scale, self.offset, self.rails = scale, offset, rails
        self.welch = sp.WelchAccumulator(L, fs, keep_bytes=keep_bytes)
        self.fft = sp.BlockFFT(L, single=single)   # single: integer blocks in float32
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
        _, mx, mn = nz.peak_to_peak(blocks)
        if self.rails is not None:
            lo, hi = self.rails
            for i in np.flatnonzero((mx >= hi) | (mn <= lo)):
                self.clipped += nz.clipping_count(blocks[i], self.rails)
        finite = np.isfinite(mx) & np.isfinite(mn)      # float files may hold NaN/inf samples
        self.flat += int(np.count_nonzero((mx == mn) & finite))
        if not finite.all():
            self.nonfinite += int((~finite).sum())
            blocks, t0, starts = blocks[finite], t0[finite], starts[finite]
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
        g = max(1, (1 << 21) // ((4 if self.fft.single else 8) * self.L))
        for a in range(0, blocks.shape[0], g):
            X, mean, _ = self.fft(blocks[a:a + g], med[a:a + g])
            if self.humfit is not None:
                self.humfit.add(self.fft.detrended)
            pp, _, _ = nz.peak_to_peak(self.fft.detrended)     # still in cache
            sd, sd_band = nz.parseval_sd(X, self.L, self.fs)
            self.welch.add(X, sd)
            if self.lines is not None:
                self.lines.add(X, starts[a:a + g], run)
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
        if self.lines is not None:
            self.lines.exclude(exclude)
        return P * self.scale ** 2, n


class _TestPulse:
    """Per-sweep step responses of one channel (bounded in memory) and a running sum of its
    sweeps; the whole-cell model is chosen on their average once every sweep is in."""

    def __init__(self, mode: str, plan: _StepPlan, ch: Any, factor: float, fs: float,
                 n_sweeps: int) -> None:
        self.mode, self.plan, self.ch, self.fs = mode, plan, ch, fs
        self.rails = None if ch.rails is None else (ch.rails[0] * factor, ch.rails[1] * factor)
        self.results: list[Any] = []            # current clamp: (sweep, CurrentClamp | None)
        self.responses: list[tuple[int, Any]] = []    # (sweep, StepResponse)
        self.rejected: list[tuple[int, Any]] = []     # (sweep, Rejected)
        self.sum: np.ndarray | None = None
        self.n_sum = 0
        self.avg_step = None
        self.same_length = True
        # fit every k-th sweep (and the first and last three): at most _TP_MAX_FITS fits and
        # _TP_KEEP_SAMPLES samples kept, as the median needs no more and long files stay fast
        lengths = [s.stop - s.start for s in plan.steps if s is not None] or [1]
        self.stride = max(1, math.ceil(sum(lengths) / _TP_KEEP_SAMPLES),
                          math.ceil(len(lengths) / _TP_MAX_FITS))
        self.n_sweeps = n_sweeps

    def add(self, k: int, x: np.ndarray) -> None:
        step = self.plan.steps[k]
        if step is None:
            return
        fs = self.fs
        if self.mode != "voltage_clamp":
            if step.amplitude < 0:
                self.results.append((k, tp.input_resistance(x, fs, step,
                                                            filter_hz=self.ch.filter_hz)))
            return
        r = tp.step_response(x, fs, step, rails=self.rails)
        if isinstance(r, tp.Rejected):
            self.rejected.append((k, r))
        elif k % self.stride == 0 or k < _TP_CHANGE_SWEEPS or \
                k >= self.n_sweeps - _TP_CHANGE_SWEEPS:
            self.responses.append((k, r))
        if self.avg_step is None:
            self.avg_step = step
        if (self.sum is not None and len(x) != len(self.sum)) or step != self.avg_step:
            self.same_length = False
            return
        self.sum = x.copy() if self.sum is None else self.sum + x
        self.n_sum += 1


_TP_KEEP_SAMPLES = 4_000_000   # step samples kept for the per-sweep fits (32 MB)
_TP_MAX_FITS = 24              # sweeps fitted one by one (the rest count in the average)
_TP_CHANGE_SWEEPS = 3          # access_change_pct: the first 3 sweeps against the last 3
_AVERAGE_DECIDES = ("no_transient", "not_separable", "above_bound", "too_short")


def _put(out: dict[str, Measure], name: str, value_si: float | None, dim: str) -> None:
    if value_si is None or not np.isfinite(value_si):
        return
    unit = display_unit(name, dim) if dim in units.DISPLAY else ""
    value = units.from_si(value_si, unit) if dim not in ("", "%") else float(value_si)
    out[name] = Measure(name, float(value), unit)


def _corner(t: _TestPulse, fs: float, out: dict[str, Measure], notes: list[str]
            ) -> float | None:
    """The low-pass corner the transient is seen through: the header's where it was set (the
    amplifier's telegraph, or a header value below Nyquist), else the corner measured from
    the noise spectrum, else None with a note."""
    ch = t.ch
    fc = ch.filter_hz
    if fc and (ch.filter_source == "telegraph" or fc < fs / 2):
        return float(fc)
    if "corner_hz" in out:
        fc = float(out["corner_hz"].value)
        notes.append(f"test step: filter corner not set in the header; the {fc:.4g} Hz corner "
                     f"of the noise spectrum is used")
        return fc
    notes.append("test step: filter corner unknown (not in the header, not found in the noise "
                 "spectrum): the transient is fitted as unfiltered")
    return None


def _tp_measures(t: _TestPulse, out: dict[str, Measure], notes: list[str]) -> None:
    if t.mode != "voltage_clamp":
        vals = [r.input_resistance for _, r in t.results if r is not None]
        if vals:
            _put(out, "input_resistance", float(np.median(vals)), "Ohm")
        elif t.results:
            notes.append("input_resistance: no hyperpolarising step gave a steady response")
        else:
            notes.append("input_resistance: no hyperpolarising current step in the sweeps")
        return
    if any(s is not None and s.to_end for s in t.plan.steps):
        notes.append("the test step lasts to the end of the sweep: steady state from its last "
                     "part, access from the onset transient; the off-transient was not seen")
    fc = _corner(t, t.fs, out, notes)
    cells: list[tuple[int, Any]] = []
    rejected = list(t.rejected)
    model = avg_cell = groups = None
    if t.responses:
        # the component model is chosen once, on the average of the sweeps with the usual
        # step (size within 2 %, length within 2 % of the median: a recorded command's step
        # varies by its noise and a sample), and each sweep is fitted with it
        amp = float(np.median([r.amplitude for _, r in t.responses]))
        n_med = float(np.median([len(r.y) for _, r in t.responses]))
        same = sorted((k, r) for k, r in t.responses
                      if abs(r.amplitude - amp) <= 0.01 * abs(amp)
                      and abs(len(r.y) - n_med) <= 0.02 * n_med)
        if not same:                     # two kinds of step, neither the usual one
            same = [min(t.responses, key=lambda kr: abs(kr[1].amplitude - amp))]
        alike = {k for k, _ in same}
        avg = tp.average_response([r for _, r in same])
        g = min(_TP_CHANGE_SWEEPS, len(same) // 2)
        if g:
            groups = ([r for _, r in same[:g]], [r for _, r in same[-g:]])
        sel = tp.transient_model(avg, filter_hz=fc)
        model = sel.fit
        avg_cell = tp.whole_cell_of(avg, filter_hz=fc, model=model)
        # a transient the average of the sweeps does not show (or cannot resolve), no single
        # sweep shows either: no per-sweep fits then
        if not (isinstance(avg_cell, tp.Rejected) and avg_cell.code in _AVERAGE_DECIDES):
            for k, r in t.responses:
                w = tp.whole_cell_of(r, filter_hz=fc, model=model if k in alike else None)
                (cells if isinstance(w, tp.WholeCell) else rejected).append((k, w))
    if isinstance(avg_cell, tp.Rejected) and avg_cell.code in ("not_separable", "above_bound"):
        # what the average of the sweeps cannot resolve, no single sweep can either
        notes.append(f"no whole-cell values: {avg_cell.reason}")
        return
    n_seen = len(cells) + len(rejected)
    if cells and len(cells) * 2 >= n_seen:
        cells.sort(key=lambda c: c[0])
        for name, dim in (("access_resistance", "Ohm"), ("membrane_resistance", "Ohm"),
                          ("membrane_capacitance", "F"), ("tau", "s")):
            _put(out, name, float(np.median([getattr(w, name) for _, w in cells])), dim)
        _whole_cell_notes(cells, fc, notes)
        if rejected:
            notes.append(f"whole-cell values from {len(cells)} of {n_seen} sweeps "
                         f"({_reason(rejected)})")
        _access_change(cells, groups, fc, model, out, notes)
        return
    if isinstance(avg_cell, tp.WholeCell):
        for name, dim in (("access_resistance", "Ohm"), ("membrane_resistance", "Ohm"),
                          ("membrane_capacitance", "F"), ("tau", "s")):
            _put(out, name, getattr(avg_cell, name), dim)
        notes.append(f"whole-cell values from the average of {avg.sweeps} sweeps (single "
                     f"sweeps: {_reason(rejected)})")
        _whole_cell_notes([(0, avg_cell)], fc, notes)
        return
    reason = _reason(rejected) or (avg_cell.reason if avg_cell is not None else "")
    if t.sum is None or not t.same_length:
        notes.append("no whole-cell transient in the test step" +
                     (f" ({reason})" if reason else ""))
        return
    avg = t.sum / t.n_sum
    kind = tp.classify(avg, t.fs, t.avg_step, filter_hz=fc, rails=t.rails)
    if kind == "whole_cell":
        notes.append("no whole-cell values: " + (reason or "the transient did not fit"))
    elif kind == "seal":
        r = tp.seal_resistance(avg, t.fs, t.avg_step)
        se = tp.seal_resistance_se(avg, t.fs, t.avg_step)
        resp = tp.step_response(avg, t.fs, t.avg_step, rails=t.rails)
        why = None if isinstance(resp, tp.Rejected) else tp.builds_up(resp, filter_hz=fc)
        if why is not None:
            notes.append(f"no seal value: {why}")
        elif r > tp.SEAL_MAX_OHM:
            notes.append(f"no seal value: the step's steady current (dV/dI {r / 1e9:.3g} GOhm) "
                         f"is beyond {tp.SEAL_MAX_OHM / 1e9:g} GOhm, where a step cannot tell an "
                         f"excellent seal from an open input with no cell or pipette")
        else:
            _put(out, "seal_resistance", r, "Ohm")
            notes.append(f"no membrane transient: seal resistance from the average of "
                         f"{t.n_sum} sweeps (+- {se / 1e9:.2g} GOhm)")
    elif kind == "open_pipette":
        r = tp.seal_resistance(avg, t.fs, t.avg_step)
        notes.append(f"the step response is an open pipette ({r / 1e6:.3g} MOhm): no seal, no "
                     f"cell")
    else:
        notes.append("no response above noise: the test step gives no resolvable current "
                     "(no cell, no seal)")


def _reason(rejected: list[tuple[int, Any]]) -> str:
    """How many sweeps gave no whole-cell value and the commonest reason."""
    if not rejected:
        return ""
    c = collections.Counter(r.reason for _, r in rejected)
    reason, k = c.most_common(1)[0]
    n = len(rejected)
    return (f"{n} sweep{'s' if n > 1 else ''} gave no value"
            + (f", {k} of them because {reason}" if n > 1 else f": {reason}"))


def _whole_cell_notes(cells: list[tuple[int, Any]], fc: float | None,
                      notes: list[str]) -> None:
    w = cells[len(cells) // 2][1]
    comps = ", ".join(f"{tau * 1e6:.0f} us" for tau, _ in w.components)
    how = ("one exponential, charge method" if w.method == "charge" else
           f"{len(w.components)} components through the "
           f"{'%.4g Hz filter' % fc if fc else 'unfiltered samples'}")
    notes.append(f"whole-cell transient: {how} (tau {comps}); access <= dV/peak "
                 f"{w.peak_bound / 1e6:.3g} MOhm")


def _access_change(cells: list[tuple[int, Any]], groups: tuple[list[Any], list[Any]] | None,
                   fc: float | None, model: Any, out: dict[str, Measure],
                   notes: list[str]) -> None:
    """access_change_pct: the first sweeps' access against the last sweeps', each group's
    access fitted on the group's average (noise lower by √g than one sweep's) with the
    file's component model, else combined from the per-sweep values by their errors."""
    if len(cells) < 2:
        return
    g = max(1, min(_TP_CHANGE_SWEEPS, len(cells) // 2))
    first = last = None
    if groups is not None and groups[0] and groups[1]:
        first = tp.whole_cell_of(tp.average_response(groups[0]), filter_hz=fc, model=model)
        last = tp.whole_cell_of(tp.average_response(groups[1]), filter_hz=fc, model=model)
    try:
        if isinstance(first, tp.WholeCell) and isinstance(last, tp.WholeCell):
            g = len(groups[0])
            pct, pct_se = tp.access_change([first.access_resistance], [last.access_resistance],
                                           [first.access_se], [last.access_se])
            how = "fitted on each group's average"
        else:
            ra = [w.access_resistance for _, w in cells]
            se = [w.access_se for _, w in cells]
            pct, pct_se = tp.access_change(ra[:g], ra[-g:], se[:g], se[-g:])
            how = "from per-sweep access and its standard error"
    except ValueError as e:
        notes.append(f"access_change_pct: {e}")
        return
    _put(out, "access_change_pct", pct, "%")
    _put(out, "access_change_pct_se", pct_se, "%")
    sweeps = f"first {g} vs last {g} sweeps" if g > 1 else "first vs last sweep"
    notes.append(f"access_change_pct {pct:+.1f} % +- {pct_se:.1f} % ({sweeps}, {how})")


def _hum_measures(h: "mains.Hum", dim: str, var: float, out: dict[str, Measure],
                  notes: list[str]) -> None:
    """hum_rms with its standard error (and an upper bound when it is not told apart from the
    floor); without a mains line found or declared, only the bound, hum_rms_max."""
    unit = display_unit("hum_rms", dim) if dim in units.DISPLAY else ""
    show = (lambda v: f"{units.from_si(v, unit):.3g} {unit}") if unit else (lambda v: f"{v:.3g}")
    if not h.found:
        _put(out, "hum_rms_max", h.rms_max, dim)
        notes.append(f"no mains line stands clear of its local noise floor at harmonics 1-"
                     f"{mains.DETECT_HARMONICS} of 50 or 60 Hz: hum_rms not measured, at most "
                     f"{show(h.rms_max)} (hum_rms_max, {mains.Z_SIGNIFICANT:g} standard errors)")
        return
    _put(out, "hum_rms", h.rms, dim)
    _put(out, "hum_rms_se", h.rms_se, dim)
    _put(out, "hum_fundamental_rms", math.sqrt(max(h.fundamental_power, 0.0)), dim)
    if var > 0:
        out["hum_fraction"] = Measure("hum_fraction", max(h.power, 0.0) / var, "")
    if not h.measured:
        _put(out, "hum_rms_max", h.rms_max, dim)
        notes.append(f"hum not told apart from the noise floor near the harmonics: hum_rms "
                     f"{show(h.rms)} +- {show(h.rms_se)}, at most {show(h.rms_max)} "
                     f"(hum_rms_max)")


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


class _Run:
    """One channel's measuring: set up from the plan, fed samples, then ``result()``.

    Gap-free files are fed raw converter counts chunk by chunk (``feed``), so that every
    channel's blocks come from one read of the file (``_gap_free_pass``); episodic files read
    their sweeps one by one (``sweeps``)."""

    def __init__(self, rec: Any, c: int, dims: _Dims, mode: str, plan: _StepPlan | None,
                 windows: list[list[tuple[int, int]]], mains_hz: float | None) -> None:
        self.rec, self.c, self.mode, self.plan, self.windows = rec, c, mode, plan, windows
        self.mains_hz = mains_hz
        self.ch = ch = rec.channels[c]
        self.dim, self.factor = dims.dim[c], dims.factor[c]
        fs = rec.fs
        self.n_total = self.clipped = 0
        self.tpr = None
        if plan is not None and plan.ok:
            self.tpr = _TestPulse(mode, plan, ch, self.factor, fs, rec.n_sweeps)
        acc: _Blocks | None
        if rec.gap_free:
            L = max(1, min(int(round(fs * _BLOCK_S)), rec.n_samples))
            gain, offset = ch.gain, ch.offset
            raw_rails = None
            if ch.rails is not None and gain != 0:
                raw_rails = tuple(sorted(((ch.rails[0] - offset) / gain,
                                          (ch.rails[1] - offset) / gain)))
            single = rec.n_samples * len(rec.channels) >= _SINGLE_MIN_SAMPLES
            acc = _Blocks(L, fs, gain * self.factor, offset * self.factor, raw_rails,
                          keep_bytes=_KEEP_BYTES // len(rec.channels), single=single) \
                if L >= _MIN_BLOCK else None
            acc_s = acc
            self.L = L
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
                    and humfit.HumFit.fits(acc_s.L, fs, mains_hz)):
                acc_s.humfit = humfit.HumFit(acc_s.L, fs, mains_hz)
        if acc_s is not None and fs / acc_s.L <= _MAX_HUM_DF and fs / 2 > 75.0:
            acc_s.lines = zoom.LineBins(acc_s.L, fs, (mains_hz,) if mains_hz else (50.0, 60.0),
                                         scale=acc_s.scale)
        self.acc, self.acc_s = acc, acc_s
        self._left: np.ndarray | None = None
        self._done = 0

    def feed(self, x: np.ndarray) -> None:
        """The next raw samples of a gap-free channel (converter counts or stored floats);
        gain, offset and the SI factor are applied to the results (every measure is linear
        in the samples or offset-free)."""
        ch, acc = self.ch, self.acc
        self.n_total += len(x)
        if acc is None:
            self.clipped += nz.clipping_count(x * ch.gain + ch.offset, ch.rails)
            return
        L, left = acc.L, self._left
        if left is not None and len(left):
            x = np.concatenate((left, x))
        nb = len(x) // L
        if nb:
            t0 = (self._done + np.arange(nb) * L + L / 2) / self.rec.fs
            self._left = x[nb * L:].copy()
            acc.add(x[:nb * L].reshape(nb, L), t0)
            self._done += nb * L
        else:
            self._left = x.copy()

    def sweeps(self) -> None:
        """Read and measure every sweep of an episodic channel."""
        rec, acc, acc_s, fs = self.rec, self.acc, self.acc_s, self.rec.fs
        for k in range(rec.n_sweeps):
            x = rec.sweep(self.c, k)
            self.n_total += len(x)
            self.clipped += nz.clipping_count(x, self.ch.rails)
            xs = x * self.factor
            if self.tpr is not None:
                self.tpr.add(k, xs)
            t_k = rec.sweep_starts_s[k]
            for target, wins in ((acc, self.windows[k][:1]),
                                 (None if acc_s is acc else acc_s, self.windows[k])):
                if target is None:
                    continue
                n_l = target.L
                for a, b in wins:
                    nb = (b - a) // n_l
                    if nb:
                        t0 = t_k + (a + np.arange(nb) * n_l + n_l / 2) / fs
                        target.add(xs[a:a + nb * n_l].reshape(nb, n_l).copy(), t0,
                                   a + np.arange(nb) * n_l, k)

    def result(self) -> ChannelMeasures:
        ch, acc, acc_s, dim = self.ch, self.acc, self.acc_s, self.dim
        rec, fs, rails, plan = self.rec, self.rec.fs, self.ch.rails, self.plan
        notes: list[str] = []
        out: dict[str, Measure] = {}
        clipped = self.clipped
        if rec.gap_free and acc is not None:
            clipped += acc.clipped
            if self._left is not None and len(self._left):
                clipped += nz.clipping_count(self._left * ch.gain + ch.offset, rails)
        spectrum = None
        for a_ in {id(acc): acc, id(acc_s): acc_s}.values():
            if a_ is not None and a_.nonfinite:
                notes.append(f"{a_.nonfinite} baseline windows hold NaN or infinite samples "
                             f"and were left out")
        if acc is None or not acc.parts["sd"]:
            notes.append("no baseline window long enough for noise measures "
                         f"(need {_MIN_BLOCK} samples at the holding level)")
        elif _all_flat(acc):
            self._flat(acc, out, notes)
            if acc_s is acc or _all_flat(acc_s):
                acc_s = None              # a spectrum of one value is only rounding
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
                notes.append("baseline_drift: baseline spans less than 1 s or fewer than 3 "
                             "windows")
        if acc_s is not None and acc_s.parts["sd"]:
            s_events = nz.event_blocks(np.concatenate(acc_s.parts["sd"]))
            spectrum = _spectral(acc_s, s_events, fs, dim, self.mains_hz, out, notes)
        if rails is not None and self.n_total:
            out["clipping_fraction"] = Measure("clipping_fraction", clipped / self.n_total, "")
        elif rails is None:
            notes.append("clipping_fraction: converter rails unknown (float samples)")
        if self.tpr is not None:
            notes.append(f"test step from the {plan.source}")
            _tp_measures(self.tpr, out, notes)
        elif plan is not None and plan.reason:
            notes.append(plan.reason)
        return ChannelMeasures(ch.index, ch.name, ch.unit.replace("\x00", "").strip() or "?",
                               dim, out, tuple(notes), spectrum)


    def _flat(self, acc: _Blocks, out: dict[str, Measure], notes: list[str]) -> None:
        """Every baseline window holds one value (an input not connected, a converter at a
        rail): holding that value and exact zeros for noise, no spectral measures."""
        a = acc.arrays()
        value = float(np.median(a["mean"]))
        if self.rec.gap_free:
            out["event_blocks"] = Measure("event_blocks", 0, "")
        _put(out, "holding", value, self.dim)
        for name in ("noise_rms", "noise_rms_1k", "noise_pp"):
            _put(out, name, 0.0, self.dim)
        unit = out["holding"].unit if "holding" in out else ""
        shown = out["holding"].value if "holding" in out else value
        notes.append(f"the samples do not change: every baseline window holds the one value "
                     f"{shown:.6g}{' ' + unit if unit else ''} (an input not connected or a "
                     f"signal at a converter rail?); noise is 0 and there is no spectrum, so "
                     f"no hum, bands, corner or lines")


def _all_flat(acc: _Blocks | None) -> bool:
    """Every block the accumulator took holds one value."""
    return acc is not None and acc.flat == sum(len(v) for v in acc.parts["sd"]) > 0


def _gap_free_pass(rec: Any, runs: list[_Run], chunk: int) -> None:
    """One read of a gap-free file for every channel: chunks of whole blocks (about ``chunk``
    samples over all channels), each channel's column fed to its run."""
    L = max(r.L for r in runs)
    per = max(L, chunk // len(runs) // L * L)
    if len(runs) == 1:
        for x in rec.raw_chunks(0, None, size=per):
            runs[0].feed(x)
        return
    for x in rec.raw_chunks_all(None, size=per):
        for c, r in enumerate(runs):
            r.feed(np.ascontiguousarray(x[:, c]))     # one short copy: later passes are fast


def _plan(rec: Any, pulse: Any, notes: list[str], mode: str | None = None
          ) -> tuple[_Dims, str, int | None, dict[int, _StepPlan], list[list[tuple[int, int]]]]:
    """(dimensions, mode, primary channel, test-step plans, baseline windows per sweep);
    ``mode`` is the rig's declared recording mode, for headers that cannot tell."""
    dims = _Dims(rec, notes)
    mode, primary = _mode(rec, dims, notes, declared=mode, pulse=pulse)
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
            mode: str | None = None, chunk_size: int = 1 << 20) -> FileMeasures:
    """Measure an open Recording (one pass over its samples).

    ``pulse`` (qcd.config.TestPulse) is used when neither the protocol nor a recorded command
    shows a test step; ``mains_hz`` (50/60) skips the 50-vs-60 detection; ``mode`` (one of
    qcd.config.DECLARED_MODES) is the rig's recording mode for headers that cannot tell;
    ``chunk_size`` is the reader's chunk length for gap-free files (results do not depend on
    it).
    """
    rec = recording
    notes: list[str] = list(rec.notes)
    dims, mode, primary, plans, windows = _plan(rec, pulse, notes, mode)
    runs = [_Run(rec, c, dims, mode, plans.get(c), windows, mains_hz)
            for c in range(len(rec.channels))]
    if rec.gap_free and runs:
        _gap_free_pass(rec, runs, chunk_size)
    else:
        for r in runs:
            r.sweeps()
    channels = tuple(r.result() for r in runs)
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
                 mode: str | None = None, digest: bool = True,
                 chunk_size: int = 1 << 20, recording: Any = None) -> FileMeasures:
    """Open, measure and close one file. A bad file gives status 'error' instead of raising.

    ``digest`` computes the file's sha256 (for the store's duplicate check); ``qcd scan``
    without ``--store`` skips it. ``recording``: the file's header already read (by intake).
    Any other exception is a bug in qcd: ``pipeline.measure`` stores it as 'internal'.
    """
    p = Path(path)
    facts = _file_facts(p, digest)
    try:
        with (recording if recording is not None else open_recording(p)) as rec:
            fm = analyze(rec, pulse=pulse, mains_hz=mains_hz, mode=mode,
                         chunk_size=chunk_size)
    except RecordingError as e:
        return FileMeasures(path=str(p), status="error", error=str(e), error_kind=e.kind,
                            **facts)
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

