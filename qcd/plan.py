"""What to measure in a recording: channel dimensions, the recording mode and primary channel,
each channel's test step (protocol, recorded command or declared pulse) and the baseline
windows of every sweep. Reads headers, commands and at most a few short stretches of samples.
Imports qcd.units and qcd.measures (testpulse on first use).
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from qcd import units
from qcd.measures import noise as nz

__all__ = ["Dims", "StepPlan", "plan_file", "tp"]


class _LazyTestPulse:
    """qcd.measures.testpulse, imported on first use (it pulls in scipy.optimize, which a
    gap-free scan never needs; start-up time counts when scanning thousands of files)."""

    def __getattr__(self, name: str) -> Any:
        from qcd.measures import testpulse
        return getattr(testpulse, name)


tp = _LazyTestPulse()

_NO_COMMAND_FRACTION = 8  # no command known: the first 1/8 of each sweep is the baseline
_TP_SPREAD = 0.10         # a test pulse keeps its size within 10 % over the sweeps
_ABSURD_AMPERES = 1e-3    # |current| above 1 mA is no patch-clamp signal: the unit is wrong


class Dims:
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
            float(nz.median(np.abs(first))) > _ABSURD_AMPERES


def _mode(rec: Any, dims: Dims, notes: list[str], *, declared: str | None = None,
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
    sd = nz.MAD_SCALE * float(nz.median(np.abs(d - nz.median(d)))) / math.sqrt(2.0)
    hold = float(nz.median(y[:max(3, min(len(y) // 20, 50))]))
    scale = float(np.max(np.abs(y))) or 1.0
    away = np.abs(y - hold) > max(6.0 * sd, 1e-6 * scale)
    idx = np.flatnonzero(away)
    if not len(idx):
        return None
    last = int(idx[-1]) + 1
    return int(idx[0]), (last if last < len(y) else None)


_SETTLE_S = 0.1           # after the command returns to holding, wait 100 ms ...
_SETTLE_FRACTION = 0.25   # ... or a quarter of the stimulated stretch, whichever is longer


def _baseline_windows(rec: Any, dims: "Dims", mode: str, primary: int | None,
                      plans: list["StepPlan"], notes: list[str]) -> list[list[tuple[int, int]]]:
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


class StepPlan:
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


def _recorded_steps(rec: Any, dims: Dims, primary: int, want_dim: str) -> tuple[list, int] | None:
    for c in range(len(rec.channels)):
        if c != primary and dims.dim[c] == want_dim:
            steps = [tp.find_step(rec.sweep(c, k) * dims.factor[c], rec.fs,
                                  open_max=_open_max(want_dim))
                     for k in range(rec.n_sweeps)]
            if any(s is not None for s in steps):
                return steps, c
    return None


def _plan_steps(rec: Any, dims: Dims, mode: str, ch: int, primary: int | None,
                pulse: Any) -> StepPlan:
    plan = StepPlan()
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
        if spread > _TP_SPREAD * float(nz.median(np.abs(amps))):
            plan.reason = (f"the step size changes from sweep to sweep ({amps.min() * 1e3:g} to "
                           f"{amps.max() * 1e3:g} mV, a step family): not a test pulse")
            plan.steps = [None] * rec.n_sweeps
    return plan


def plan_file(rec: Any, pulse: Any, notes: list[str], mode: str | None = None
          ) -> tuple[Dims, str, int | None, dict[int, StepPlan], list[list[tuple[int, int]]]]:
    """(dimensions, mode, primary channel, test-step plans, baseline windows per sweep);
    ``mode`` is the rig's declared recording mode, for headers that cannot tell."""
    dims = Dims(rec, notes)
    mode, primary = _mode(rec, dims, notes, declared=mode, pulse=pulse)
    want = {"voltage_clamp": "A", "current_clamp": "V"}.get(mode)
    plans: dict[int, StepPlan] = {}
    if want is not None:
        for c in range(len(rec.channels)):
            if dims.dim[c] == want and (c == primary or c in rec.commands):
                plans[c] = _plan_steps(rec, dims, mode, c, primary, pulse)
    windows = [] if rec.gap_free else _baseline_windows(rec, dims, mode, primary,
                                                        list(plans.values()), notes)
    return dims, mode, primary, plans, windows
