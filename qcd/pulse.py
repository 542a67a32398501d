"""The test pulse of one channel: ``PulseRun`` gathers per-sweep step responses (bounded in
memory) and a running sum of the sweeps; ``pulse_measures`` chooses the whole-cell model once
on their average and gives access, membrane, capacitance, tau, access change, seal or input
resistance, with notes. Imports qcd.measures (testpulse on first use, through qcd.plan's tp),
qcd.plan, qcd.blocks (put), qcd.results.
"""
from __future__ import annotations

import collections
import math
from typing import Any

import numpy as np

from qcd.blocks import put
from qcd.plan import StepPlan, tp
from qcd.results import Measure

__all__ = ["PulseRun", "pulse_measures"]


class PulseRun:
    """Per-sweep step responses of one channel (bounded in memory) and a running sum of its
    sweeps; the whole-cell model is chosen on their average once every sweep is in."""

    def __init__(self, mode: str, plan: StepPlan, ch: Any, factor: float, fs: float,
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


def _corner(t: PulseRun, fs: float, out: dict[str, Measure], notes: list[str]
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


def pulse_measures(t: PulseRun, out: dict[str, Measure], notes: list[str]) -> None:
    if t.mode != "voltage_clamp":
        vals = [r.input_resistance for _, r in t.results if r is not None]
        if vals:
            put(out, "input_resistance", float(np.median(vals)), "Ohm")
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
            put(out, name, float(np.median([getattr(w, name) for _, w in cells])), dim)
        _whole_cell_notes(cells, fc, notes)
        if rejected:
            notes.append(f"whole-cell values from {len(cells)} of {n_seen} sweeps "
                         f"({_reason(rejected)})")
        _access_change(cells, groups, fc, model, out, notes)
        return
    if isinstance(avg_cell, tp.WholeCell):
        for name, dim in (("access_resistance", "Ohm"), ("membrane_resistance", "Ohm"),
                          ("membrane_capacitance", "F"), ("tau", "s")):
            put(out, name, getattr(avg_cell, name), dim)
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
            put(out, "seal_resistance", r, "Ohm")
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
    put(out, "access_change_pct", pct, "%")
    put(out, "access_change_pct_se", pct_se, "%")
    sweeps = f"first {g} vs last {g} sweeps" if g > 1 else "first vs last sweep"
    notes.append(f"access_change_pct {pct:+.1f} % +- {pct_se:.1f} % ({sweeps}, {how})")
